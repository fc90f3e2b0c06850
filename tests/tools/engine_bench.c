/*
 * engine_bench: memory per series and the cost of one engine tick, for
 * `make bench` (bench/run.sh). It feeds a record file to the engine the
 * way replay does (engine_apply per record, a tick per second of record
 * time), then reports as one JSON object:
 *
 *   - resident-size growth from before the first record to after the
 *     last, divided by the engine's series (experiment x arm x metric),
 *     beside the engine's own accounting (engine_counters().bytes);
 *   - the wall time of engine_tick over every experiment when every test
 *     has new data (each experiment's control got one record per metric
 *     since the last tick; median of several), of engine_finish after
 *     the same touch (every test looks, however little its data grew:
 *     the worst case), and of an idle tick.
 *
 *   engine_bench CONF FILE
 */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "stopcock/conf.h"
#include "stopcock/engine.h"
#include "stopcock/proto.h"
#include "stopcock/util.h"

#define BENCH_TICKS 5		/* timed ticks, median reported */

struct touch {
	char	experiment[PROTO_NAME_MAX + 1];
	char	control[PROTO_NAME_MAX + 1];
	char	metric[PROTO_NAME_MAX + 1];
	int	count;		/* 1: count metric, 0: observe */
};

struct bench {
	struct touch	*t;
	size_t		 n, cap;
};

static double
bench_now(void)
{
	struct timespec ts;

	clock_gettime(CLOCK_MONOTONIC, &ts);
	return (double)ts.tv_sec + (double)ts.tv_nsec / 1e9;
}

static long
bench_rss_kib(void)
{
	FILE *fp = fopen("/proc/self/statm", "r");
	long size, rss;

	if (fp == NULL)
		return -1;
	if (fscanf(fp, "%ld %ld", &size, &rss) != 2)
		rss = -1;
	fclose(fp);
	return rss < 0 ? -1 : rss * (sysconf(_SC_PAGESIZE) / 1024);
}

/* Remember one (experiment, metric) per test so each can be touched. */
static void
bench_collect(void *arg, const struct finding *f)
{
	struct bench *b = arg;
	struct touch *t;
	size_t i;

	if (f->kind != FINDING_VERDICT || f->metric == NULL)
		return;
	for (i = b->n; i > 0; i--)
		if (strcmp(b->t[i - 1].experiment, f->experiment) != 0)
			break;
		else if (strcmp(b->t[i - 1].metric, f->metric) == 0)
			return;
	if (b->n == b->cap) {
		b->cap = b->cap ? b->cap * 2 : 1024;
		b->t = xreallocarray(b->t, b->cap, sizeof *b->t);
	}
	t = &b->t[b->n++];
	snprintf(t->experiment, sizeof t->experiment, "%s", f->experiment);
	snprintf(t->control, sizeof t->control, "%s", f->control);
	snprintf(t->metric, sizeof t->metric, "%s", f->metric);
	t->count = strcmp(f->test, "proportion") == 0 ||
	    strcmp(f->test, "rate") == 0;
}

/* One new record for every (experiment, metric) on the control arm, so
 * every test of every experiment has to be evaluated at the next tick. */
static void
bench_touch(struct engine *eng, const struct bench *b, double now,
    uint64_t *event)
{
	struct record r;
	char line[PROTO_LINE_MAX];
	size_t i;
	int n;

	for (i = 0; i < b->n; i++) {
		if (b->t[i].count)
			n = snprintf(line, sizeof line, "count %s %s %s 0 1",
			    b->t[i].experiment, b->t[i].control,
			    b->t[i].metric);
		else
			n = snprintf(line, sizeof line, "observe %s %s %s 100",
			    b->t[i].experiment, b->t[i].control,
			    b->t[i].metric);
		if (n > 0 && proto_parse(line, (size_t)n, &r) == PROTO_OK)
			engine_apply(eng, &r, now, ++*event);
	}
}

static int
bench_cmp(const void *a, const void *b)
{
	double x = *(const double *)a, y = *(const double *)b;

	return x < y ? -1 : x > y;
}

int
main(int argc, char **argv)
{
	struct conf *conf;
	struct engine *eng;
	struct engine_counters c;
	struct record r;
	struct bench b = { NULL, 0, 0 };
	uint8_t key[16] = { 0 };
	char *cause = NULL, *line = NULL;
	size_t cap = 0;
	ssize_t len;
	uint64_t event = 0, records = 0, bad = 0;
	double now = 0, last_tick = 0, t0, t1, apply_s, full[BENCH_TICKS];
	double idle[BENCH_TICKS], forced[BENCH_TICKS];
	long rss0, rss1;
	FILE *fp;
	int i;

	if (argc != 3) {
		fprintf(stderr, "usage: engine_bench CONF FILE\n");
		return 64;
	}
	if (conf_load(argv[1], &conf, &cause) != 0) {
		fprintf(stderr, "%s\n", cause);
		return 78;
	}
	if ((fp = fopen(argv[2], "r")) == NULL) {
		fprintf(stderr, "engine_bench: %s: %s\n", argv[2],
		    strerror(errno));
		return 66;
	}
	eng = engine_new(conf, key);
	rss0 = bench_rss_kib();
	t0 = bench_now();
	while ((len = getline(&line, &cap, fp)) > 0) {
		if (line[len - 1] == '\n')
			line[--len] = '\0';
		if (proto_parse(line, (size_t)len, &r) != PROTO_OK) {
			bad++;
			continue;
		}
		if (r.has_ts && r.ts > now)
			now = r.ts;
		if (engine_apply(eng, &r, now, ++event) != ENGINE_OK)
			bad++;
		else
			records++;
		/* the daemon's tick: once per second of (record) time */
		if (now - last_tick >= conf->tick) {
			engine_tick(eng, now);
			last_tick = now;
		}
	}
	engine_finish(eng, now);
	t1 = bench_now();
	apply_s = t1 - t0;
	rss1 = bench_rss_kib();
	free(line);
	fclose(fp);
	engine_counters(eng, &c);

	engine_foreach(eng, bench_collect, &b);
	for (i = 0; i < BENCH_TICKS; i++) {
		bench_touch(eng, &b, now, &event);
		now += conf->tick;
		t0 = bench_now();
		engine_tick(eng, now);
		full[i] = bench_now() - t0;
		t0 = bench_now();
		engine_tick(eng, now);
		idle[i] = bench_now() - t0;
		bench_touch(eng, &b, now, &event);
		now += conf->tick;
		t0 = bench_now();
		engine_finish(eng, now);
		forced[i] = bench_now() - t0;
	}
	qsort(full, BENCH_TICKS, sizeof *full, bench_cmp);
	qsort(idle, BENCH_TICKS, sizeof *idle, bench_cmp);
	qsort(forced, BENCH_TICKS, sizeof *forced, bench_cmp);

	printf("{\"records\": %llu, \"rejected\": %llu, \"apply_seconds\": %.3f,"
	    " \"experiments\": %u, \"series\": %llu, \"tests\": %llu,"
	    " \"rss_before_kib\": %ld, \"rss_after_kib\": %ld,"
	    " \"rss_bytes_per_series\": %.1f, \"engine_bytes\": %zu,"
	    " \"engine_bytes_per_series\": %.1f,"
	    " \"tick_all_dirty_ms\": %.3f, \"tick_idle_ms\": %.3f,"
	    " \"tick_forced_ms\": %.3f, \"tick_budget\": %u,"
	    " \"touched_metrics\": %zu}\n",
	    (unsigned long long)records, (unsigned long long)bad, apply_s,
	    c.experiments, (unsigned long long)c.series,
	    (unsigned long long)c.tests, rss0, rss1,
	    c.series ? (double)(rss1 - rss0) * 1024 / (double)c.series : NAN,
	    c.bytes, c.series ? (double)c.bytes / (double)c.series : NAN,
	    full[BENCH_TICKS / 2] * 1e3, idle[BENCH_TICKS / 2] * 1e3,
	    forced[BENCH_TICKS / 2] * 1e3, conf->tick_budget, b.n);
	free(b.t);
	engine_free(eng);
	conf_free(conf);
	return 0;
}
