/*
 * alert_int.h: what alert.c (the alerts' life), alert_text.c (the
 * words of an alert: its summary and its syslog fields) and
 * alert_carry.c (an alert's saved form, and its travel with a Kafka
 * partition) share. Not for use outside them.
 */
#ifndef STOPCOCK_ALERT_INT_H
#define STOPCOCK_ALERT_INT_H

#include "daemon.h"

#define ALERT_LINE_MAX	2048	/* bytes in one syslog line */
#define ALERT_MAX	4096	/* alerts remembered (raised and acked) */
#define ALERT_ID_BYTES	16	/* of SHA-256, as hex after "sc_" */

enum alert_state { ALERT_RAISED, ALERT_ACKED, ALERT_RESOLVED };
enum alert_sev { SEV_CRITICAL, SEV_WARNING, SEV_INFO };

/* The names in syslog, webhooks, the API, metrics and the state. */
extern const char *const alert_states[];	/* 3 */
extern const char *const alert_sevs[];		/* 3 */
extern const char *const alert_kinds[ALERT_NKINDS];

struct alert_entry {
	char		 id[3 + 2 * ALERT_ID_BYTES + 1];
	char		*experiment;
	uint32_t	 epoch;
	double		 epoch_start;	/* record time; NAN in old state */
	char		*guardrail;
	char		*variant;	/* "" for the SRM check */
	enum alert_kind	 kind;
	enum alert_state state;
	enum alert_sev	 severity;
	int		 priority;
	double		 first_seen;	/* wall time */
	double		 last_sent;
	uint32_t	 reminders;
	double		 resolved_at;	/* wall time, 0 while not resolved */
	char		*resolution;	/* why it was resolved, or NULL */
	char		*line;		/* syslog fields, for every event */
	json_t		*body;		/* webhook payload as first sent */
};

/* Owned by the daemon (alert_new, alert_free). */
struct alert {
	struct daemon		*d;
	int			 facility;
	struct event		*remind;
	double			 remind_every;
	struct alert_entry	**v;
	size_t			 n;
	uint64_t		 raised[ALERT_NKINDS];
	uint64_t		 reminders;
	uint64_t		 acked;
	uint64_t		 resolved;
	uint64_t		 evicted;
	uint64_t		 duplicates;
	uint64_t		 untrusted_safe;	/* safe under SRM */
	uint64_t		 adopted;	/* from a partition's state */
	uint64_t		 carried_refused;	/* carried, malformed */
	uint64_t		 forgotten;	/* left with a partition */
	struct event		*am_timer;	/* Alertmanager refreshes */
	double			 am_resend;
	struct alert_journal	*journal;	/* NULL until started */
	uint64_t		 jseq;		/* newest event journaled */
};

/* The alerts' table (alert.c). */
void	alert_make_id(char *out, const char *experiment, uint32_t epoch,
	    double start, const char *guardrail, const char *variant,
	    const char *what);
void	alert_entry_free(struct alert_entry *);
struct alert_entry *alert_find(struct alert *, const char *id);
void	alert_remove_at(struct alert *, size_t i);
void	alert_insert(struct alert *, struct alert_entry *);
int	alert_merge(struct alert *, struct alert_entry *);
/* Before any output hears of an event, the journal has it on disk. */
void	alert_journal_note(struct alert *, const struct alert_entry *);

/* An alert's saved form (alert_carry.c): the checkpoint's, the
 * journal's and a Kafka partition state's. */
json_t	*alert_carry_entry(const struct alert_entry *);
struct alert_entry *alert_carry_load(const json_t *, char **cause);
/* How far an alert's life has gone: it only ever moves forward. */
uint64_t alert_carry_progress(const struct alert_entry *);

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
