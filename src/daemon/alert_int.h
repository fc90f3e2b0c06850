/*
 * alert_int.h: what alert.c (the alerts' life) and alert_text.c (the
 * words of an alert: its summary and its syslog fields) share. Not for
 * use outside them.
 */
#ifndef STOPCOCK_ALERT_INT_H
#define STOPCOCK_ALERT_INT_H

#include "daemon.h"

#define ALERT_LINE_MAX	2048	/* bytes in one syslog line */

/* The SRM check's own alerts, which speak of arms, not a guardrail. */
static inline int
alert_text_srm(enum alert_kind kind)
{
	return kind == ALERT_SRM || kind == ALERT_UNTRUSTED;
}

/* One human sentence: what happened, where, how sure (reason: the
 * pause's, may be NULL; unit: the guardrail's, may be ""). */
char	*alert_text_summary(const struct finding *, enum alert_kind,
	    const char *reason, const char *unit);
/* The key=value fields of the syslog line (after "alert EVENT"). */
char	*alert_text_fields(const struct finding *, const char *id,
	    enum alert_kind, const char *kind_name, const char *severity,
	    const char *link, const char *unit);

#endif
