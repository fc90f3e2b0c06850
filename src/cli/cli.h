/*
 * cli.h: subcommands of the `stopcock` command-line tool. Each returns a
 * sysexits(3) code. main.c dispatches; every subcommand drives the same
 * core engine the daemon runs.
 */
#ifndef STOPCOCK_CLI_H
#define STOPCOCK_CLI_H

#include <stddef.h>

#include <jansson.h>

/* An HTTP answer read by libcurl (status.c; action.c uses it too). */
struct status_body {
	char	*p;		/* NUL-terminated, NULL when empty */
	size_t	 len;
	size_t	 max;		/* bytes kept at most */
	int	 overflow;	/* the answer was longer than max */
};
size_t	status_body_write(char *, size_t, size_t, void *);
/* GET base+path as JSON: the answer (200), or NULL with *code (0: no
 * answer, 404: none there) and *cause. */
json_t	*status_fetch(const char *base, const char *path, long *code,
	    char **cause);

int	cmd_replay(int, char **);	/* replay.c */
int	cmd_check_config(int, char **);	/* main.c */
int	cmd_simulate(int, char **);	/* simulate.c */
int	cmd_generate(int, char **);	/* generate.c */
int	cmd_status(int, char **);	/* status.c */
int	cmd_retire(int, char **);	/* action.c */
int	cmd_ack(int, char **);
int	cmd_close(int, char **);
int	cmd_epoch(int, char **);
int	cmd_reset(int, char **);
int	cmd_plan(int, char **);

#endif
