/*
 * pending.c: weak placeholders so `stopcock` links while subcommands are
 * written in parallel; each real definition overrides its placeholder.
 * Deleted once every subcommand has landed.
 */
#include <stdio.h>

#include "stopcock/util.h"
#include "cli.h"

#define WEAK __attribute__((weak))

static int
missing(const char *name)
{
	fprintf(stderr, "stopcock: %s is not built yet\n", name);
	return SC_EX_SOFTWARE;
}

WEAK int cmd_simulate(int c, char **v) { return missing("simulate"); }
WEAK int cmd_generate(int c, char **v) { return missing("generate"); }
WEAK int cmd_status(int c, char **v) { return missing("status"); }
