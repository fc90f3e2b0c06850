/*
 * replay.c: `stopcock replay -c CONF [FILE|-]` runs the full engine over a
 * recorded log, in order, exactly as the daemon would have: cheap tests
 * after every record, costly ones (quantiles, rate bounds) whenever record
 * time advances by the tick (1 s by default) and at the end. Every
 * verdict that starts to hold is printed as one JSON line on stdout; a
 * summary goes to stderr. Bad lines are counted by reason and the first
 * few reported with their line number; they never stop the run.
 */
#include <sys/mman.h>
#include <sys/stat.h>

#include <errno.h>
#include <getopt.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <jansson.h>

#include "stopcock/chart.h"
#include "stopcock/conf.h"
#include "stopcock/engine.h"
#include "stopcock/proto.h"
#include "stopcock/util.h"
#include "cli.h"

#define REPLAY_BUF (1 << 20)		/* read size */
#define REPLAY_REPORT_BAD 5		/* bad lines shown with their number */
#define REPLAY_TICK_RECORDS 65536	/* tick at least this often */

struct replay {
	struct engine	*engine;
	FILE		*out;
	uint64_t	 lines, records, skipped;
	uint64_t	 bad[PROTO_NSTATUS];
	uint64_t	 refused[ENGINE_NREJECT];
	uint64_t	 verdicts, harms, safes, srms;
	uint64_t	 reported;
	double		 now, last_tick, tick;
	int		 tty;
	int		 quiet;
};

static void
replay_sink(void *arg, const struct finding *f)
{
	struct replay *r = arg;
	json_t *o;

	if (f->kind != FINDING_VERDICT && f->kind != FINDING_SRM)
		return;
	if (f->kind == FINDING_SRM)
		r->srms++;
	else if (f->verdict == VERDICT_HARM)
		r->harms++;
	else if (f->verdict == VERDICT_SAFE)
		r->safes++;
	r->verdicts++;
	o = finding_json(f);
	json_dumpf(o, r->out, JSON_COMPACT | JSON_REAL_PRECISION(10));
	fputc('\n', r->out);
	json_decref(o);
}

static void
replay_bad(struct replay *r, const char *what, const char *why)
{
	if (r->reported++ < REPLAY_REPORT_BAD)
		fprintf(stderr, "stopcock: line %llu: %s: %s\n",
		    (unsigned long long)r->lines, what, why);
}

static void
replay_line(struct replay *r, const char *line, size_t len)
{
	struct record rec;
	enum proto_status ps;
	enum engine_reject er;

	r->lines++;
	if (len > PROTO_LINE_MAX) {
		r->bad[PROTO_E_LONG]++;
		replay_bad(r, proto_reason(PROTO_E_LONG),
		    proto_describe(PROTO_E_LONG));
		return;
	}
	ps = proto_parse(line, len, &rec);
	if (ps == PROTO_SKIP) {
		r->skipped++;
		return;
	}
	if (ps != PROTO_OK) {
		r->bad[ps]++;
		replay_bad(r, proto_reason(ps), proto_describe(ps));
		return;
	}
	/* Records without a timestamp take the latest record time. */
	if (rec.has_ts && rec.ts > r->now)
		r->now = rec.ts;
	er = engine_apply(r->engine, &rec, r->now, r->lines);
	if (er != ENGINE_OK) {
		r->refused[er]++;
		replay_bad(r, engine_reason(er), "refused by the engine");
		return;
	}
	r->records++;
	if (r->now - r->last_tick >= r->tick ||
	    r->records % REPLAY_TICK_RECORDS == 0) {
		engine_tick(r->engine, r->now);
		r->last_tick = r->now;
	}
	if (r->tty && !r->quiet && (r->lines & 0xfffff) == 0)
		fprintf(stderr, "\rstopcock: %llu lines, %llu verdicts",
		    (unsigned long long)r->lines,
		    (unsigned long long)r->verdicts);
}

/*
 * Split the input into lines without a per-line allocation. A line longer
 * than the buffer can hold is counted as too long and skipped to its end.
 */
static int
replay_read(struct replay *r, FILE *in)
{
	char *buf = xmalloc(REPLAY_BUF + PROTO_LINE_MAX + 2);
	size_t have = 0, n, start, i;
	const char *nl;
	int overlong = 0;

	for (;;) {
		n = fread(buf + have, 1, REPLAY_BUF + PROTO_LINE_MAX + 1 - have,
		    in);
		if (n == 0)
			break;
		have += n;
		start = 0;
		/* memchr finds newlines many bytes at a time */
		while (start < have && (nl = memchr(buf + start, '\n',
		    have - start)) != NULL) {
			i = (size_t)(nl - buf);
			if (overlong)
				overlong = 0;
			else
				replay_line(r, buf + start, i - start);
			start = i + 1;
		}
		if (start == 0 && have > PROTO_LINE_MAX) {
			/* no newline in reach: count once, skip to newline */
			if (!overlong) {
				r->lines++;
				r->bad[PROTO_E_LONG]++;
				replay_bad(r, proto_reason(PROTO_E_LONG),
				    proto_describe(PROTO_E_LONG));
			}
			overlong = 1;
			have = 0;
			continue;
		}
		memmove(buf, buf + start, have - start);
		have -= start;
	}
	if (have > 0 && !overlong)
		replay_line(r, buf, have);
	free(buf);
	return ferror(in) ? -1 : 0;
}

/*
 * A regular file is mapped rather than read: replay's input is large and
 * read once, and copying it through a buffer cost a fifth of the time.
 * Returns 1 when the file cannot be mapped (the caller reads it instead).
 */
static int
replay_map(struct replay *r, FILE *in)
{
	struct stat st;
	const char *base, *p, *end, *nl;
	int fd = fileno(in);

	if (fstat(fd, &st) != 0 || !S_ISREG(st.st_mode) || st.st_size <= 0)
		return 1;
	base = mmap(NULL, (size_t)st.st_size, PROT_READ, MAP_PRIVATE, fd, 0);
	if (base == MAP_FAILED)
		return 1;
	(void)madvise((void *)base, (size_t)st.st_size, MADV_SEQUENTIAL);
	end = base + st.st_size;
	for (p = base; p < end; p = nl + 1) {
		if ((nl = memchr(p, '\n', (size_t)(end - p))) == NULL)
			nl = end;
		replay_line(r, p, (size_t)(nl - p));
	}
	munmap((void *)base, (size_t)st.st_size);
	return 0;
}

static void
replay_summary(struct replay *r)
{
	struct engine_counters c;
	uint64_t bad = 0, refused = 0;
	int i;

	engine_counters(r->engine, &c);
	if (r->tty && !r->quiet)
		fputc('\n', stderr);
	for (i = 0; i < PROTO_NSTATUS; i++)
		bad += r->bad[i];
	for (i = 0; i < ENGINE_NREJECT; i++)
		refused += r->refused[i];
	fprintf(stderr, "stopcock: %llu lines, %llu records applied, "
	    "%llu rejected, %u experiments, %llu verdicts (%llu harm, "
	    "%llu safe, %llu srm)\n", (unsigned long long)r->lines,
	    (unsigned long long)r->records,
	    (unsigned long long)(bad + refused), c.experiments,
	    (unsigned long long)r->verdicts, (unsigned long long)r->harms,
	    (unsigned long long)r->safes, (unsigned long long)r->srms);
	for (i = 0; i < PROTO_NSTATUS; i++)
		if (r->bad[i])
			fprintf(stderr, "stopcock:   rejected %s: %llu\n",
			    proto_reason((enum proto_status)i),
			    (unsigned long long)r->bad[i]);
	for (i = 0; i < ENGINE_NREJECT; i++)
		if (r->refused[i])
			fprintf(stderr, "stopcock:   rejected %s: %llu\n",
			    engine_reason((enum engine_reject)i),
			    (unsigned long long)r->refused[i]);
}

/* Write one SVG chart per test and per SRM check into dir. */
static int
replay_report(struct replay *r, const char *dir)
{
	json_t *list, *exp, *e, *tests, *t;
	size_t i, j;
	char *path, *svg;
	const char *id;
	FILE *fp;
	int rc = 0;

	list = engine_json_list(r->engine);
	json_array_foreach(json_object_get(list, "experiments"), i, e) {
		id = json_string_value(json_object_get(e, "id"));
		exp = engine_json_experiment(r->engine, id);
		tests = json_object_get(exp, "tests");
		for (j = 0; j <= json_array_size(tests); j++) {
			if (j < json_array_size(tests)) {
				t = json_array_get(tests, j);
				svg = chart_test_svg(t);
				xasprintf(&path, "%s/%s-%s-%s.svg", dir, id,
				    json_string_value(json_object_get(t,
				    "guardrail")), json_string_value(
				    json_object_get(t, "variant")));
			} else {
				svg = chart_srm_svg(exp);
				xasprintf(&path, "%s/%s-srm.svg", dir, id);
			}
			if ((fp = fopen(path, "w")) == NULL ||
			    fputs(svg, fp) < 0 || fclose(fp) != 0) {
				fprintf(stderr, "stopcock: %s: %s\n", path,
				    strerror(errno));
				rc = -1;
			}
			free(svg);
			free(path);
		}
		json_decref(exp);
	}
	json_decref(list);
	return rc;
}

static void
replay_usage(FILE *fp)
{
	fprintf(fp, "usage: stopcock replay [-q] [-c CONF] [--report DIR] "
	    "[FILE | -]\n"
	    "  -c CONF        configuration (default "
	    "/etc/stopcock/stopcock.conf)\n"
	    "  --report DIR   write each test's chart as an SVG file\n"
	    "  -q             no progress line\n");
}

int
cmd_replay(int argc, char **argv)
{
	static const struct option longopts[] = {
		{ "report", required_argument, NULL, 'r' },
		{ "help", no_argument, NULL, 'h' },
		{ NULL, 0, NULL, 0 }
	};
	const char *confpath = "/etc/stopcock/stopcock.conf", *report = NULL;
	const char *inpath = "-";
	struct replay r;
	struct conf *conf;
	uint8_t key[16] = { 0 };
	char *cause = NULL;
	struct stat st;
	FILE *in;
	int ch, rc;

	memset(&r, 0, sizeof r);
	optind = 1;
	while ((ch = getopt_long(argc, argv, "c:qh", longopts, NULL)) != -1) {
		switch (ch) {
		case 'c':
			confpath = optarg;
			break;
		case 'q':
			r.quiet = 1;
			break;
		case 'r':
			report = optarg;
			break;
		case 'h':
			replay_usage(stdout);
			return SC_EX_OK;
		default:
			replay_usage(stderr);
			return SC_EX_USAGE;
		}
	}
	if (argc - optind > 1) {
		replay_usage(stderr);
		return SC_EX_USAGE;
	}
	if (argc - optind == 1)
		inpath = argv[optind];
	/* A report directory that is not there fails now, not after the
	 * whole replay. */
	errno = 0;
	if (report != NULL && (stat(report, &st) != 0 || !S_ISDIR(st.st_mode) ||
	    access(report, W_OK) != 0)) {
		fprintf(stderr, "stopcock: --report %s: %s\n", report,
		    errno != 0 ? strerror(errno) : "not a directory");
		return SC_EX_USAGE;
	}
	if (conf_load(confpath, &conf, &cause) != 0) {
		fprintf(stderr, "%s\n", cause);
		free(cause);
		return SC_EX_CONFIG;
	}
	if (strcmp(inpath, "-") == 0)
		in = stdin;
	else if ((in = fopen(inpath, "r")) == NULL) {
		fprintf(stderr, "stopcock: %s: %s\n", inpath, strerror(errno));
		conf_free(conf);
		return SC_EX_NOINPUT;
	}
	/* Replay is deterministic: a fixed hash key is fine offline. */
	r.engine = engine_new(conf, key);
	r.out = stdout;
	r.tick = conf->tick > 0 ? conf->tick : 1;
	r.tty = isatty(STDERR_FILENO);
	engine_set_sink(r.engine, replay_sink, &r);
	rc = replay_map(&r, in) == 0 ? 0 : replay_read(&r, in);
	engine_finish(r.engine, r.now);
	fflush(stdout);
	replay_summary(&r);
	if (rc != 0)
		fprintf(stderr, "stopcock: %s: read error\n", inpath);
	if (report != NULL && replay_report(&r, report) != 0)
		rc = -1;
	if (in != stdin)
		fclose(in);
	engine_free(r.engine);
	conf_free(conf);
	return rc == 0 ? SC_EX_OK : SC_EX_IOERR;
}
