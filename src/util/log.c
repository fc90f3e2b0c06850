/*
 * log.c: the one logger (after OpenSMTPD's log.c). In the foreground lines
 * go to stderr with a level prefix; as a service they go to syslog(3).
 * Callers end messages with key=value fields so lines stay greppable.
 * This is the only mutable global state in stopcock.
 */
#include <errno.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <syslog.h>

#include "stopcock/log.h"

static struct {
	int	foreground;
	int	verbose;
	int	opened;
} logger = { 1, 0, 0 };

static const struct {
	const char	*name;
	int		 code;
} facilities[] = {
	{ "daemon", LOG_DAEMON }, { "user", LOG_USER }, { "local0", LOG_LOCAL0 },
	{ "local1", LOG_LOCAL1 }, { "local2", LOG_LOCAL2 },
	{ "local3", LOG_LOCAL3 }, { "local4", LOG_LOCAL4 },
	{ "local5", LOG_LOCAL5 }, { "local6", LOG_LOCAL6 },
	{ "local7", LOG_LOCAL7 },
};

int
log_facility(const char *name)
{
	size_t i;

	for (i = 0; i < SC_NELEM(facilities); i++)
		if (strcmp(facilities[i].name, name) == 0)
			return facilities[i].code;
	return -1;
}

int
log_init(const char *ident, const char *facility, int foreground, int verbose)
{
	int fac = log_facility(facility ? facility : "daemon");

	if (fac == -1)
		return -1;
	logger.foreground = foreground;
	logger.verbose = verbose;
	if (!foreground) {
		if (logger.opened)
			closelog();
		openlog(ident, LOG_PID | LOG_NDELAY, fac);
		logger.opened = 1;
	}
	return 0;
}

void
log_set_verbose(int v)
{
	logger.verbose = v;
}

/* The attribute lets the compiler check vfprintf's format through the
 * callers' own printf attributes (log.h), rather than reject it as a
 * non-literal format (clang's -Wformat-nonliteral under -Wformat=2). */
static void vlog(int, const char *, va_list) SC_PRINTF(2, 0);

static void
vlog(int pri, const char *fmt, va_list ap)
{
	static const char *names[] = {
		"emerg", "alert", "crit", "error", "warning", "notice", "info",
		"debug"
	};

	if (pri == LOG_DEBUG && !logger.verbose)
		return;
	if (logger.foreground) {
		fprintf(stderr, "%s: ", names[pri & 7]);
		vfprintf(stderr, fmt, ap);
		fputc('\n', stderr);
	} else
		vsyslog(pri, fmt, ap);
}

#define LOGFN(fn, pri)						\
void								\
fn(const char *fmt, ...)					\
{								\
	va_list ap;						\
								\
	va_start(ap, fmt);					\
	vlog(pri, fmt, ap);					\
	va_end(ap);						\
}
LOGFN(log_warnx, LOG_WARNING)
LOGFN(log_info, LOG_INFO)
LOGFN(log_debug, LOG_DEBUG)
LOGFN(log_crit, LOG_CRIT)

void
log_warn(const char *fmt, ...)
{
	char buf[1024];
	int saved = errno;
	va_list ap;

	va_start(ap, fmt);
	vsnprintf(buf, sizeof buf, fmt, ap);
	va_end(ap);
	log_warnx("%s: %s", buf, strerror(saved));
}

void
fatalx(const char *fmt, ...)
{
	va_list ap;

	va_start(ap, fmt);
	vlog(LOG_CRIT, fmt, ap);
	va_end(ap);
	exit(1);
}
