/*
 * kafka_in_int.h: what kafka_in.c (the consumer, assignment, metrics)
 * and kafka_state.c (partition states: the engine image, transactions,
 * reading states back) share. Not for use outside them.
 */
#ifndef STOPCOCK_KAFKA_IN_INT_H
#define STOPCOCK_KAFKA_IN_INT_H

#include <stdint.h>

#include <librdkafka/rdkafka.h>

#include "daemon.h"

#define KAFKA_PARTITIONS_MAX	4096	/* input partitions one daemon holds */
#define KAFKA_POLL_BUDGET	4096	/* messages per loop turn */
#define KAFKA_TXN_MS		10000	/* one transactional call, at most */
#define KAFKA_TXN_PARALLEL	16	/* transactions side by side */
#define KAFKA_LOAD_MS		30000	/* reading an assignment's states */
#define KAFKA_POLL_EVERY	0.2	/* s: serve callbacks even when idle */
#define KAFKA_HOST_MAX		256
#define KAFKA_STATE_FORMAT	"stopcock-kafka-partition"
#define KAFKA_STATE_VERSION	1

enum kafka_pstate { KP_RUNNING, KP_REFUSED, KP_FENCED, KP_NSTATES };
extern const char *const kafka_pstate_names[];

/* Messages refused before their lines reach ingest. */
enum kafka_bad { KB_NO_KEY, KB_TOO_BIG, KB_N };
extern const char *const kafka_bad_names[];

/* Why an assigned partition was refused. */
enum kafka_refusal {
	KR_NO_STATE,		/* committed offset, no state */
	KR_MISMATCH,		/* state and committed offset disagree */
	KR_BAD_STATE,		/* state unreadable or not restorable */
	KR_UNREACHABLE,		/* state or offsets could not be read */
	KR_N
};
extern const char *const kafka_refusal_names[];

/* Per partition; kept in its state so the counts are exactly-once too. */
struct kafka_counts {
	uint64_t	messages;
	uint64_t	bytes;
	uint64_t	lines;
	uint64_t	records;
	uint64_t	bad[KB_N];
	uint64_t	proto_rejected[PROTO_NSTATUS];
	uint64_t	engine_rejected[ENGINE_NREJECT];
};

struct kafka_part {
	int32_t		 id;
	enum kafka_pstate state;
	rd_kafka_t	*txn;		/* transactional producer */
	int64_t		 next;		/* next offset to read; -1: start */
	int64_t		 committed;	/* next offset, as last committed */
	json_t		*keys;		/* experiment ids seen: a set */
	struct engine	*eng;		/* its experiments; NULL unless
					 * running */
	struct kafka_counts c;
	uint64_t	 commits;
	uint64_t	 commit_failures;
	int		 dirty;		/* read something since the commit */
	size_t		 stray;		/* kafka_state_stray at the last
					 * commit or load */
	uint64_t	 findings;	/* its engine's, at the last commit:
					 * a finding of the tick (no record)
					 * is carried too */
};

struct kafka_in {
	struct daemon	*d;
	rd_kafka_t	*rk;		/* the group consumer */
	rd_kafka_t	*reader;	/* state topic reader, no group */
	rd_kafka_queue_t *q;
	int		 pipe[2];
	struct event	*ev_io;
	struct event	*ev_more;
	struct event	*ev_poll;
	struct event	*ev_commit;
	/* fixed at start (see the comment on d->conf) */
	char		*topic;
	char		*group;
	char		*state_topic;
	char		*client_id;
	char		*instance_id;
	uint32_t	 max_message;
	struct kafka_part *parts[KAFKA_PARTITIONS_MAX];
	int		 closed;
	uint64_t	 rebalances;
	uint64_t	 assigned;
	uint64_t	 revoked;
	uint64_t	 lost;
	uint64_t	 fenced;
	uint64_t	 refused[KR_N];
	uint64_t	 consume_errors;
	uint64_t	 unowned;	/* messages of a partition not ours */
	size_t		 stray;		/* experiments no key of theirs names */
};

/* A state read: what one partition's state topic partition held. */
struct kafka_read {
	int32_t		 id;
	json_t		*state;		/* the last state message, or NULL */
	int		 found;		/* a state message was there */
	int		 done;		/* end reached, or failed */
	char		*cause;		/* why it failed, or NULL */
};

static inline const char *
kafka_str(const char *s)
{
	return s != NULL ? s : "";
}

/* kafka_in.c */
int		 kafka_in_set(rd_kafka_conf_t *, const char *key,
		    const char *value, char **cause);
rd_kafka_conf_t	*kafka_in_conf(struct kafka_in *, const char *suffix,
		    char **cause);

/* kafka_state.c */
void		 kafka_state_drop(struct kafka_in *, struct kafka_part *);
int		 kafka_state_commit(struct kafka_in *, struct kafka_part **,
		    int);
void		 kafka_state_commit_all(struct kafka_in *, const char *why);
rd_kafka_t	*kafka_state_producer(struct kafka_in *, int32_t id,
		    char **cause);
void		 kafka_state_read(struct kafka_in *, struct kafka_read *,
		    int n);
void		 kafka_state_refuse(struct kafka_in *, struct kafka_part *,
		    enum kafka_refusal, const char *what, const char *detail);
void		 kafka_state_load(struct kafka_in *, struct kafka_part *,
		    int64_t committed, struct kafka_read *);

#endif
