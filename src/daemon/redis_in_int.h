/*
 * redis_in_int.h: what redis_in.c (the consumer's connection, reads and
 * state machine) and redis_house.c (its housekeeping between reads:
 * acknowledgements, dead letters, reclaiming, lag) share. Internal to
 * the Redis consumer; the rest of the daemon sees daemon.h only.
 */
#ifndef STOPCOCK_REDIS_IN_INT_H
#define STOPCOCK_REDIS_IN_INT_H

#include <stdint.h>

#include <event2/event.h>
#include <hiredis/hiredis.h>
#include <hiredis/async.h>

#include "daemon.h"

#define REDIS_IN_ANSWER 5.0	/* seconds for any answer beyond a block */
#define REDIS_IN_BACKOFF_MIN 0.1
#define REDIS_IN_BACKOFF_MAX 10.0
#define REDIS_IN_INFO_EVERY 5.0	/* lag and pending refresh, seconds */
#define REDIS_IN_ACK_BATCH 1000	/* IDs per XPENDING/XACK round */
#define REDIS_IN_LAG_SCAN 10000	/* entries counted when Redis gives no lag */

enum redis_in_state {
	RS_IDLE,	/* not connected; a retry is scheduled */
	RS_CONNECTING,
	RS_SETUP,	/* XGROUP CREATE in flight */
	RS_PENDING,	/* reading back our own pending entries */
	RS_STEADY,	/* new entries, housekeeping between reads */
	RS_STANDBY,	/* the lease is not ours (redis_lease.c): no reads */
	RS_STOPPED	/* shutting down: never reconnect */
};

/*
 * Why an entry went to the dead-letter stream: it had no `records` field
 * (nothing to apply, ever), or applying it failed max_deliveries times
 * (the daemon died while applying it that often: a crash loop).
 */
enum redis_in_dead { DEAD_NO_RECORDS, DEAD_APPLY_FAILED, DEAD_N };

/* Where trimmed entries were found (for the trimmed counter's label). */
enum redis_in_trim { TRIM_PENDING, TRIM_UNDELIVERED, TRIM_N };

/*
 * Where the consumer's group was made (for the counter's label): a new
 * group at the stream's end or its beginning ([redis] start), or one
 * lost after it was made (a Redis restart without persistence, XGROUP
 * DESTROY) made again after the last checkpointed entry, or at the
 * stream's start when the stream holds nothing that far.
 */
enum redis_in_made { MADE_END, MADE_BEGINNING, MADE_CHECKPOINT,
    MADE_STREAM_START, MADE_N };

/* A stream entry ID. 0-0 is below every real entry. */
struct sid {
	uint64_t	ms;
	uint64_t	seq;
};

#define SID_BUF 48

struct redis_lease;

struct redis_in {
	struct daemon		*d;
	enum redis_in_state	 state;
	redisAsyncContext	*ac;
	struct redis_lease	*lease;
	int			 ha;		/* [redis] ha: fenced reads */
	const char		*fail_why;	/* for the deferred drop */

	/* Fixed at start (a reload does not move the consumer). */
	char			*address;
	char			*host;
	int			 port;
	char			*unix_path;
	char			*stream;
	char			*group;
	char			*consumer;
	char			*dead;
	int			 start_beginning;	/* [redis] start */

	struct sid		 last;		/* last applied */
	struct sid		 covered;	/* by the last checkpoint */
	uint64_t		 covered_gen;
	uint64_t		 sweep_gen;
	int			 ack_due;
	struct sid		 pel_cursor;
	struct sid		 claim_cursor;

	/*
	 * Failures to apply, counted by the daemon itself (never Redis's
	 * delivery counter, which our own re-reads raise): a small file in
	 * the state directory names the batch of entries being applied; if
	 * it is still there at start, the last run died applying one of
	 * them. Batches holding such an entry are marked entry by entry,
	 * so a second death names the very entry.
	 */
	int			 mark_fd;	/* -1: no crash-loop guard */
	int			 mark_each;	/* this batch: entry by entry */
	struct sid		 suspect;	/* the last run died in */
	struct sid		 suspect_last;	/* [suspect, suspect_last] */
	unsigned		 suspect_failures;

	/*
	 * The group: had_group once it existed for us (then a missing one
	 * was lost, not new); origin is where we made it. The setup_*
	 * fields hold the choice made from XINFO STREAM until XGROUP
	 * CREATE answers.
	 */
	int			 had_group;
	struct sid		 origin;
	enum redis_in_made	 setup_made;
	struct sid		 setup_at;
	int64_t			 setup_len;	/* entries in the stream */
	int			 setup_reset;	/* stream behind last applied */
	uint64_t		 made[MADE_N];
	uint64_t		 start_skipped;	/* by a new group at the end */
	char			 made_at[SID_BUF];	/* the last one */

	struct event		*retry_ev;
	struct event		*watchdog_ev;
	struct event		*fail_ev;	/* deferred drop */
	double			 backoff;
	double			 connect_since;
	unsigned		 outstanding;	/* commands without answer */
	double			 wait_since;
	int			 reading;	/* blocking XREADGROUP out */
	unsigned		 ops;		/* housekeeping commands out */
	double			 next_claim;
	double			 next_info;
	int			 no_idle_filter;	/* Redis < 6.2 */
	char			 last_str[SID_BUF];

	int64_t			 lag;		/* -1: unknown */
	int			 lag_capped;
	int64_t			 pending;
	int64_t			 pending_own;
	uint64_t		 entries;	/* applied */
	uint64_t		 skipped;	/* at or below the checkpoint */
	uint64_t		 deleted;	/* pending, gone from stream */
	uint64_t		 trimmed[TRIM_N];	/* before being applied */
	int64_t			 trim_gap;	/* undelivered trims counted */
	/* XINFO STREAM, read just before XINFO GROUPS on each info round */
	int			 info_ok;
	struct sid		 info_lastgen;	/* last-generated-id */
	struct sid		 info_first;	/* first entry left, 0-0 none */
	int64_t			 info_added;	/* entries-added, -1 unknown */
	int64_t			 info_len;
	struct sid		 trim_first;	/* run being gathered */
	struct sid		 trim_last;
	uint64_t		 trim_n;
	uint64_t		 dead_count[DEAD_N];
	uint64_t		 dead_failed;
	uint64_t		 claimed;
	uint64_t		 acked;
	uint64_t		 reconnects;
	uint64_t		 errors;
};

/* Reason labels for metrics, JSON and the dead-letter entries. */
extern const char *const redis_in_dead_names[DEAD_N];
extern const char *const redis_in_trim_names[TRIM_N];
extern const char *const redis_in_made_names[MADE_N];

/* redis_in.c */
int		 redis_in_sid_parse(const char *, size_t, struct sid *);
const char	*redis_in_sid_fmt(struct sid, char *);
int		 redis_in_sid_cmp(struct sid, struct sid);
struct sid	 redis_in_sid_next(struct sid);
int		 redis_in_sid_reply(const redisReply *, struct sid *);
void		 redis_in_fail(struct redis_in *, const char *cmd,
		    const redisReply *);
int		 redis_in_answer(struct redis_in *, const redisReply *);
int		 redis_in_cmd(struct redis_in *, redisCallbackFn *, void *,
		    const char *fmt, ...);
int		 redis_in_argv(struct redis_in *, redisCallbackFn *, void *,
		    int argc, const char **argv, const size_t *lens);
void		 redis_in_op_done(struct redis_in *);
int		 redis_in_entry(struct redis_in *, const redisReply *);
/* Around every list of entries handed to redis_in_entry: the crash-loop
 * guard's mark, and the log of the trimmed ones it gathered. */
void		 redis_in_batch_begin(struct redis_in *, const redisReply *);
void		 redis_in_batch_end(struct redis_in *);
void		 redis_in_next(struct redis_in *);
/* An XREADGROUP answer: new entries, or (pel) our own pending ones. */
void		 redis_in_read_reply(struct redis_in *, const redisReply *,
		    int pel);
/* The group exists: read our own pending entries back. */
void		 redis_in_setup_done(struct redis_in *);

/* The lease lets us consume: (re)connect and read; or no longer. */
void		 redis_in_resume(struct redis_in *);
void		 redis_in_suspend(struct redis_in *, const char *why);
/* Taking over: the adopted checkpoint's last applied entry ("" none). */
void		 redis_in_position(struct redis_in *, const char *last_id);

/* redis_lease.c: the one consumer of a group, by a lease in Redis. */
extern const char redis_lease_read_lua[];
struct redis_lease *redis_lease_new(struct redis_in *, char **cause);
void		 redis_lease_free(struct redis_lease *);
/* Ours, confirmed recently enough to read and apply now. */
int		 redis_lease_valid(const struct redis_lease *);
const char	*redis_lease_key(const struct redis_lease *);
const char	*redis_lease_token(const struct redis_lease *);
const char	*redis_lease_role(struct redis_lease *);
void		 redis_lease_lost(struct redis_lease *);
/* Under ha, the consumer's reads: fenced by the token (pel: our own
 * pending entries from r->pel_cursor, else new ones). */
void		 redis_lease_read(struct redis_lease *, int pel);
void		 redis_lease_metrics(struct redis_lease *, struct evbuffer *);
json_t		*redis_lease_json(struct redis_lease *);

/* redis_house.c */
void		 redis_house_ack_ids(struct redis_in *, const char **ids,
		    const size_t *lens, size_t n);
void		 redis_house_ack_one(struct redis_in *, struct sid);
void		 redis_house_dead_letter(struct redis_in *, struct sid,
		    const redisReply *fields, enum redis_in_dead);
void		 redis_house_sweep(struct redis_in *);
void		 redis_house_claim(struct redis_in *);
void		 redis_house_info(struct redis_in *);
/* After connecting: XINFO STREAM, then XGROUP CREATE at the right place. */
void		 redis_house_setup(struct redis_in *);

/* redis_in_guard.c: the crash-loop guard's file */
void	redis_in_guard_open(struct redis_in *);
void	redis_in_guard_close(struct redis_in *);
void	redis_in_guard_write(struct redis_in *, const char *text);
void	redis_in_guard_range(struct redis_in *, struct sid, struct sid,
	    unsigned failures);
unsigned redis_in_guard_failures(struct redis_in *, struct sid);

#endif
