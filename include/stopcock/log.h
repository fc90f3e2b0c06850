/*
 * log.h: the one logger. Lines go to syslog(3) when running as a service
 * and to stderr in the foreground; every line may end with key=value
 * fields. The logger is the only mutable global in stopcock.
 */
#ifndef STOPCOCK_LOG_H
#define STOPCOCK_LOG_H

#include "stopcock/util.h"

/* ident and facility (a syslog facility name such as "daemon"); returns
 * -1 for an unknown facility. */
int log_init(const char *ident, const char *facility, int foreground,
    int verbose);
void log_set_verbose(int);
void log_warnx(const char *, ...) SC_PRINTF(1, 2);
void log_warn(const char *, ...) SC_PRINTF(1, 2);   /* appends strerror */
void log_info(const char *, ...) SC_PRINTF(1, 2);
void log_debug(const char *, ...) SC_PRINTF(1, 2);
void log_crit(const char *, ...) SC_PRINTF(1, 2);
void fatalx(const char *, ...) SC_PRINTF(1, 2) SC_NORETURN;
/* syslog facility code for a name, or -1. */
int log_facility(const char *);

#endif
