/*
 * cli.h: subcommands of the `stopcock` command-line tool. Each returns a
 * sysexits(3) code. main.c dispatches; every subcommand drives the same
 * core engine the daemon runs.
 */
#ifndef STOPCOCK_CLI_H
#define STOPCOCK_CLI_H

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
