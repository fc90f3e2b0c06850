/*
 * statedump: everything a replay computes, for comparing two builds byte
 * for byte (bench/identical.sh). It feeds a record file to the engine the
 * way `stopcock replay` does (engine_apply per line, engine_tick when
 * record time advances by the tick or every 65536 records, engine_finish
 * at the end) and prints on stdout:
 *
 *   - every finding the sink receives, of any kind, as finding_json;
 *   - the engine's full state image (engine_save: tallies, sketches,
 *     unit groups, test states) and, per experiment, the API view
 *     (engine_json_experiment: estimates, bounds, chart history);
 *
 * all with 17 significant digits, so any change in a sum's last bit shows.
 *
 *   statedump CONF FILE
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <jansson.h>

#include "stopcock/conf.h"
#include "stopcock/engine.h"
#include "stopcock/proto.h"
#include "stopcock/util.h"

#define DUMP_TICK_RECORDS 65536	/* as replay's REPLAY_TICK_RECORDS */
#define DUMP_FLAGS (JSON_COMPACT | JSON_SORT_KEYS | JSON_REAL_PRECISION(17))

struct dump {
	struct engine	*engine;
	uint64_t	 lines, records, rejected;
	double		 now, last_tick, tick;
};

static void
dump_sink(void *arg, const struct finding *f)
{
	json_t *o = finding_json(f);

	(void)arg;
	json_dumpf(o, stdout, DUMP_FLAGS);
	fputc('\n', stdout);
	json_decref(o);
}

static void
dump_line(struct dump *d, const char *line, size_t len)
{
	struct record rec;
	enum proto_status ps;

	d->lines++;
	if (len > PROTO_LINE_MAX) {
		d->rejected++;
		return;
	}
	ps = proto_parse(line, len, &rec);
	if (ps == PROTO_SKIP)
		return;
	if (ps != PROTO_OK) {
		printf("line %llu: %s\n", (unsigned long long)d->lines,
		    proto_reason(ps));
		d->rejected++;
		return;
	}
	if (rec.has_ts && rec.ts > d->now)
		d->now = rec.ts;
	if (engine_apply(d->engine, &rec, d->now, d->lines) != ENGINE_OK) {
		d->rejected++;
		return;
	}
	d->records++;
	if (d->now - d->last_tick >= d->tick ||
	    d->records % DUMP_TICK_RECORDS == 0) {
		engine_tick(d->engine, d->now);
		d->last_tick = d->now;
	}
}

int
main(int argc, char **argv)
{
	struct dump d;
	struct conf *conf;
	uint8_t key[16] = { 0 };
	char *cause = NULL, *line = NULL;
	size_t cap = 0, i;
	ssize_t n;
	json_t *img, *list, *e, *x;
	FILE *in;

	if (argc != 3) {
		fprintf(stderr, "usage: statedump CONF FILE\n");
		return 2;
	}
	if (conf_load(argv[1], &conf, &cause) != 0) {
		fprintf(stderr, "%s\n", cause);
		free(cause);
		return 1;
	}
	if ((in = fopen(argv[2], "r")) == NULL) {
		perror(argv[2]);
		conf_free(conf);
		return 1;
	}
	memset(&d, 0, sizeof d);
	d.engine = engine_new(conf, key);
	d.tick = conf->tick > 0 ? conf->tick : 1;
	engine_set_sink(d.engine, dump_sink, &d);
	while ((n = getline(&line, &cap, in)) >= 0) {
		if (n > 0 && line[n - 1] == '\n')
			n--;
		dump_line(&d, line, (size_t)n);
	}
	free(line);
	fclose(in);
	engine_finish(d.engine, d.now);
	printf("lines %llu records %llu rejected %llu\n",
	    (unsigned long long)d.lines, (unsigned long long)d.records,
	    (unsigned long long)d.rejected);
	img = engine_save(d.engine);
	json_dumpf(img, stdout, DUMP_FLAGS);
	fputc('\n', stdout);
	json_decref(img);
	list = engine_json_list(d.engine);
	json_array_foreach(json_object_get(list, "experiments"), i, e) {
		x = engine_json_experiment(d.engine,
		    json_string_value(json_object_get(e, "id")));
		json_dumpf(x, stdout, DUMP_FLAGS);
		fputc('\n', stdout);
		json_decref(x);
	}
	json_decref(list);
	engine_free(d.engine);
	conf_free(conf);
	return 0;
}
