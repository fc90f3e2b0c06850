/*
 * main.c: the `stopcock` command-line tool: a table of subcommands, each
 * in its own file, all driving the same pure engine as the daemon.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/conf.h"
#include "stopcock/util.h"
#include "cli.h"

#ifndef STOPCOCK_VERSION
#define STOPCOCK_VERSION "0.1.0"
#endif

static const struct {
	const char	*name;
	int		(*fn)(int, char **);
	const char	*help;
} commands[] = {
	{ "replay", cmd_replay,
	  "run the engine over a recorded log and print verdicts" },
	{ "simulate", cmd_simulate,
	  "plan: false-alarm rate, power and time to detection" },
	{ "generate", cmd_generate,
	  "write a synthetic record stream (demo and benchmarks)" },
	{ "status", cmd_status, "show a running daemon's experiments" },
	{ "retire", cmd_retire,
	  "archive an experiment and free its slot on a running daemon" },
	{ "ack", cmd_ack, "acknowledge a guardrail's alert on a running daemon" },
	{ "close", cmd_close, "close a guardrail's alert (resolved)" },
	{ "epoch", cmd_epoch, "start a new epoch of an experiment" },
	{ "reset", cmd_reset, "forget an experiment's tallies and evidence" },
	{ "plan", cmd_plan, "plan an experiment: ARM=WEIGHT ARM=WEIGHT..." },
	{ "check-config", cmd_check_config,
	  "validate a configuration file" },
};

static void
usage(FILE *fp)
{
	size_t i;

	fprintf(fp, "usage: stopcock COMMAND [options]\n\ncommands:\n");
	for (i = 0; i < SC_NELEM(commands); i++)
		fprintf(fp, "  %-14s %s\n", commands[i].name, commands[i].help);
	fprintf(fp, "\n`stopcock COMMAND -h` shows a command's options;"
	    " `stopcock check-config --keys` lists every configuration key.\n");
}

int
cmd_check_config(int argc, char **argv)
{
	struct conf *conf;
	char *cause = NULL;
	const char *path = "/etc/stopcock/stopcock.conf";

	if (argc == 2 && strcmp(argv[1], "--keys") == 0) {
		conf_help(stdout);
		return SC_EX_OK;
	}
	if (argc == 2 && strcmp(argv[1], "-h") == 0) {
		printf("usage: stopcock check-config [FILE | --keys]\n");
		return SC_EX_OK;
	}
	if (argc > 2) {
		fprintf(stderr, "usage: stopcock check-config [FILE | --keys]\n");
		return SC_EX_USAGE;
	}
	if (argc == 2)
		path = argv[1];
	/* The daemon's own check too: what stopcockd -t refuses. */
	if (conf_load(path, &conf, &cause) != 0 ||
	    conf_check_daemon(conf, &cause) != 0) {
		fprintf(stderr, "%s\nconfiguration has errors\n", cause);
		free(cause);
		conf_free(conf);
		return SC_EX_CONFIG;
	}
	printf("configuration OK: %d guardrails, %d planned experiments\n",
	    conf->nguardrails, conf->nexperiments);
	conf_free(conf);
	return SC_EX_OK;
}

int
main(int argc, char **argv)
{
	size_t i;

	if (argc < 2) {
		usage(stderr);
		return SC_EX_USAGE;
	}
	if (strcmp(argv[1], "--version") == 0 ||
	    strcmp(argv[1], "version") == 0) {
		printf("stopcock %s\n", STOPCOCK_VERSION);
		return SC_EX_OK;
	}
	if (strcmp(argv[1], "-h") == 0 || strcmp(argv[1], "--help") == 0 ||
	    strcmp(argv[1], "help") == 0) {
		usage(stdout);
		return SC_EX_OK;
	}
	for (i = 0; i < SC_NELEM(commands); i++)
		if (strcmp(argv[1], commands[i].name) == 0)
			return commands[i].fn(argc - 1, argv + 1);
	fprintf(stderr, "stopcock: unknown command '%s'\n", argv[1]);
	usage(stderr);
	return SC_EX_USAGE;
}
