/*
 * generate.c: `stopcock generate [options] > FILE` writes a synthetic
 * record stream in the plain protocol form, from the same generator that
 * `stopcock simulate` drives the engine with (scenario.c). It feeds the
 * demo (`--scenario demo`), the benchmarks (`--records 10000000
 * --experiments 100`) and the end-to-end tests. Output is seeded and
 * reproducible, and written through a large stdio buffer so tens of
 * millions of records take seconds.
 */
#include <errno.h>
#include <getopt.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/conf.h"
#include "stopcock/proto.h"
#include "stopcock/util.h"
#include "cli.h"
#include "scenario.h"

#define GENERATE_BUF (4 << 20)

static void
generate_usage(FILE *fp)
{
	fprintf(fp, "usage: stopcock generate [options] > FILE\n"
	    "  -c CONF              give every metric of CONF's guardrails a "
	    "baseline\n"
	    "  --seed S             random seed (default 1)\n"
	    "%s", scenario_help);
}

int
cmd_generate(int argc, char **argv)
{
	static const struct option longopts[] = {
		SCENARIO_LONGOPTS,
		{ "seed", required_argument, NULL, 'S' },
		{ "config", required_argument, NULL, 'c' },
		{ "help", no_argument, NULL, 'h' },
		{ NULL, 0, NULL, 0 }
	};
	struct scenario s;
	struct scenario_opts o;
	struct scenario_gen *g;
	struct record r;
	struct conf *conf = NULL;
	const char *confpath = NULL;
	static char obuf[GENERATE_BUF];
	char *cause = NULL, line[PROTO_LINE_MAX + 2];
	uint64_t seed = 1;
	int ch, n, rc = SC_EX_OK;

	scenario_init(&s);
	memset(&o, 0, sizeof o);
	scenario_preset(&s, argc, argv);
	optind = 1;
	while ((ch = getopt_long(argc, argv, "c:h", longopts, NULL)) != -1) {
		switch (ch) {
		case 'c':
			confpath = optarg;
			break;
		case 'S':
			if (parse_u64(optarg, UINT64_MAX, &seed) != 0) {
				fprintf(stderr, "stopcock generate: bad seed "
				    "'%s'\n", optarg);
				return SC_EX_USAGE;
			}
			break;
		case 'h':
			generate_usage(stdout);
			return SC_EX_OK;
		default:
			if (ch >= SOPT_EXPERIMENTS && ch < SOPT_LAST) {
				if (scenario_option(&s, &o, ch, optarg,
				    &cause) == 0)
					break;
				fprintf(stderr, "stopcock generate: %s\n",
				    cause);
				free(cause);
				return SC_EX_USAGE;
			}
			generate_usage(stderr);
			return SC_EX_USAGE;
		}
	}
	if (optind != argc) {
		generate_usage(stderr);
		return SC_EX_USAGE;
	}
	if (confpath != NULL && conf_load(confpath, &conf, &cause) != 0) {
		fprintf(stderr, "%s\n", cause);
		free(cause);
		return SC_EX_CONFIG;
	}
	if (scenario_finish(&s, conf, &o, &cause) != 0) {
		fprintf(stderr, "stopcock generate: %s\n", cause);
		free(cause);
		conf_free(conf);
		return SC_EX_USAGE;
	}
	conf_free(conf);

	/* static: stdout may use its buffer until the process exits */
	if (setvbuf(stdout, obuf, _IOFBF, GENERATE_BUF) != 0)
		fatal("setvbuf: %s", strerror(errno));
	g = scenario_gen_new(&s, seed);
	while (scenario_next(g, &r)) {
		if ((n = proto_format(&r, line, sizeof line - 1)) < 0)
			fatal("generate: a record does not format");
		line[n++] = '\n';
		if (fwrite_unlocked(line, 1, (size_t)n, stdout) != (size_t)n)
			break;
	}
	scenario_gen_free(g);
	if (fflush(stdout) != 0 || ferror(stdout)) {
		fprintf(stderr, "stopcock generate: write error: %s\n",
		    strerror(errno));
		rc = SC_EX_IOERR;
	}
	return rc;
}
