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

/* The alerts' write-ahead log (alert_journal.c). */
struct alert_journal;
struct alert_journal *alert_journal_open(const char *dir, char **cause);
void	alert_journal_free(struct alert_journal *);
void	alert_journal_append(struct alert_journal *, uint64_t seq,
	    const json_t *entry);
int	alert_journal_replay(struct alert_journal *, uint64_t after,
	    void (*)(void *, uint64_t, const json_t *), void *);
void	alert_journal_replayed(struct alert_journal *);
void	alert_journal_covered(struct alert_journal *, uint64_t seq);
void	alert_journal_metrics(const struct alert_journal *,
	    struct evbuffer *);

#endif
