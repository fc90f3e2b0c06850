/*
 * redis_house.c: the Redis consumer's housekeeping, run one step at a
 * time between two blocking reads (redis_in.c decides when):
 *  - acknowledging what the last checkpoint covers: XPENDING - <covered>
 *    for our consumer, then XACK of the IDs it lists;
 *  - dead letters: an entry is copied with its fields plus origin and
 *    reason to the dead-letter stream (XADD), and acknowledged only once
 *    the copy is stored;
 *  - entries idle on other consumers (dead ones, or this daemon under an
 *    older name) are reclaimed: XPENDING IDLE lists them with their
 *    owner, XCLAIM takes those that are not ours, and they are applied
 *    like any other, the checkpoint's ID rule and the failure count
 *    included. Our own pending entries are never claimed: they are
 *    applied and wait for a checkpoint, and claiming them would only
 *    raise Redis's delivery counter;
 *  - lag (XINFO STREAM and GROUPS: Redis's lag, corrected for entries
 *    trimmed before delivery, 0 once the group has read the last entry;
 *    counting entries after the group's last delivered one when Redis
 *    gives no lag), trims before delivery, and pending counts (XPENDING
 *    summary) for metrics and STATUS=;
 *  - before any of that, on each connection, the group's setup: a new
 *    group starts where [redis] start says, a lost one (a Redis restart
 *    without persistence, XGROUP DESTROY) after the checkpoint's last
 *    entry, both logged and counted (redis_house_setup).
 * Every command here counts in r->ops; the next read waits for zero.
 */
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/log.h"
#include "redis_in_int.h"

const char *const redis_in_dead_names[DEAD_N] = {
	"no_records", "apply_failed"
};

const char *const redis_in_trim_names[TRIM_N] = {
	"pending", "undelivered"
};

const char *const redis_in_made_names[MADE_N] = {
	"end", "beginning", "checkpoint", "stream_start"
};

/* Context of one dead-letter move (XADD then XACK). */
struct redis_house_dl {
	struct sid		 id;
	enum redis_in_dead	 reason;
};

static void
redis_house_ack_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;

	if (redis_in_answer(r, rep) != 0)
		return;
	if (rep->type == REDIS_REPLY_INTEGER)
		r->acked += (uint64_t)rep->integer;
	else
		log_warnx("redis: XACK failed: %.*s", (int)rep->len,
		    rep->str != NULL ? rep->str : "");
	redis_in_op_done(r);
}

/* XACK the IDs in elements [0, n) of an array of entries or IDs. */
void
redis_house_ack_ids(struct redis_in *r, const char **ids, const size_t *lens,
    size_t n)
{
	const char **argv;
	size_t *alen, i;

	if (n == 0)
		return;
	argv = xreallocarray(NULL, n + 3, sizeof *argv);
	alen = xreallocarray(NULL, n + 3, sizeof *alen);
	argv[0] = "XACK";
	argv[1] = r->stream;
	argv[2] = r->group;
	for (i = 0; i < 3; i++)
		alen[i] = strlen(argv[i]);
	for (i = 0; i < n; i++) {
		argv[i + 3] = ids[i];
		alen[i + 3] = lens[i];
	}
	if (redis_in_argv(r, redis_house_ack_cb, NULL, (int)(n + 3), argv,
	    alen) == 0)
		r->ops++;
	free(argv);
	free(alen);
}

void
redis_house_ack_one(struct redis_in *r, struct sid id)
{
	char buf[SID_BUF];
	const char *p = redis_in_sid_fmt(id, buf);
	size_t len = strlen(p);

	redis_house_ack_ids(r, &p, &len, 1);
}

static void
redis_house_dead_added_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	struct redis_house_dl *dl = priv;
	redisReply *rep = reply;
	char buf[SID_BUF];

	if (redis_in_answer(r, rep) != 0) {
		free(dl);
		return;
	}
	if (rep->type == REDIS_REPLY_ERROR) {
		r->dead_failed++;
		log_warnx("redis: dead-letter XADD failed: %.*s entry=%s "
		    "dead_letter=%s", (int)rep->len, rep->str,
		    redis_in_sid_fmt(dl->id, buf), r->dead);
	} else {
		r->dead_count[dl->reason]++;
		log_warnx("redis: entry moved to the dead-letter stream: %s "
		    "entry=%s dead_letter=%s", redis_in_dead_names[dl->reason],
		    redis_in_sid_fmt(dl->id, buf), r->dead);
		redis_house_ack_one(r, dl->id);
	}
	free(dl);
	redis_in_op_done(r);
}

/*
 * Copy an entry to the dead-letter stream with its original fields plus
 * origin (its ID) and reason, then XACK it once the copy is stored.
 */
void
redis_house_dead_letter(struct redis_in *r, struct sid id,
    const redisReply *fields, enum redis_in_dead reason)
{
	struct redis_house_dl *dl;
	const char **argv;
	size_t *alen, n = 0, i, nf;
	char buf[SID_BUF];

	nf = fields != NULL && fields->type == REDIS_REPLY_ARRAY ?
	    fields->elements : 0;
	argv = xreallocarray(NULL, nf + 7, sizeof *argv);
	alen = xreallocarray(NULL, nf + 7, sizeof *alen);
	argv[n] = "XADD"; alen[n] = 4; n++;
	argv[n] = r->dead; alen[n] = strlen(r->dead); n++;
	argv[n] = "*"; alen[n] = 1; n++;
	for (i = 0; i + 1 < nf; i += 2) {
		const redisReply *f = fields->element[i];
		const redisReply *v = fields->element[i + 1];

		if (f->type != REDIS_REPLY_STRING ||
		    v->type != REDIS_REPLY_STRING)
			continue;
		argv[n] = f->str; alen[n] = f->len; n++;
		argv[n] = v->str; alen[n] = v->len; n++;
	}
	argv[n] = "origin"; alen[n] = 6; n++;
	argv[n] = redis_in_sid_fmt(id, buf); alen[n] = strlen(buf); n++;
	argv[n] = "reason"; alen[n] = 6; n++;
	argv[n] = redis_in_dead_names[reason];
	alen[n] = strlen(argv[n]); n++;
	dl = xcalloc(1, sizeof *dl);
	dl->id = id;
	dl->reason = reason;
	/* XADD wants field/value pairs: with no fields at all the origin and
	 * reason pairs alone keep it well formed. */
	if (redis_in_argv(r, redis_house_dead_added_cb, dl, (int)n, argv,
	    alen) == 0)
		r->ops++;
	else
		free(dl);
	free(argv);
	free(alen);
}

static void
redis_house_sweep_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;
	const char **ids;
	size_t *lens, i, n = 0;
	const redisReply *e;

	if (redis_in_answer(r, rep) != 0)
		return;
	if (rep->type != REDIS_REPLY_ARRAY) {
		log_warnx("redis: XPENDING (ack sweep) failed: %.*s",
		    (int)rep->len, rep->str != NULL ? rep->str : "");
		r->errors++;
		r->ack_due = 0;
		redis_in_op_done(r);
		return;
	}
	ids = xreallocarray(NULL, rep->elements + 1, sizeof *ids);
	lens = xreallocarray(NULL, rep->elements + 1, sizeof *lens);
	for (i = 0; i < rep->elements; i++) {
		e = rep->element[i];
		if (e->type != REDIS_REPLY_ARRAY || e->elements < 1 ||
		    e->element[0]->type != REDIS_REPLY_STRING)
			continue;
		ids[n] = e->element[0]->str;
		lens[n++] = e->element[0]->len;
	}
	redis_house_ack_ids(r, ids, lens, n);
	free(ids);
	free(lens);
	/* A full page may hide more; a newer checkpoint needs another. */
	if (rep->elements < REDIS_IN_ACK_BATCH &&
	    r->covered_gen == r->sweep_gen)
		r->ack_due = 0;
	redis_in_op_done(r);
}

void
redis_house_sweep(struct redis_in *r)
{
	char cov[SID_BUF];

	if (r->covered.ms == 0 && r->covered.seq == 0) {
		r->ack_due = 0;
		redis_in_next(r);
		return;
	}
	r->sweep_gen = r->covered_gen;
	if (redis_in_cmd(r, redis_house_sweep_cb, NULL,
	    "XPENDING %s %s - %s %d %s", r->stream, r->group,
	    redis_in_sid_fmt(r->covered, cov), REDIS_IN_ACK_BATCH,
	    r->consumer) == 0)
		r->ops++;
}

/* Wait before the next claim round: half claim_idle, 1 s to 30 s. */
static void
redis_house_claim_later(struct redis_in *r)
{
	double every = r->d->conf->redis_claim_idle / 2;

	every = every < 1 ? 1 : every > 30 ? 30 : every;
	r->next_claim = daemon_now() + every;
	r->claim_cursor.ms = r->claim_cursor.seq = 0;
}

/* XCLAIM answer: entries now ours, applied like any delivered one. */
static void
redis_house_claimed_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;
	size_t i, n = 0;

	if (redis_in_answer(r, rep) != 0)
		return;
	if (!redis_lease_valid(r->lease)) {
		/* Claimed but not applied: pending on us, read back later. */
		redis_in_op_done(r);
		redis_in_suspend(r, "lease not confirmed");
		return;
	}
	if (rep->type != REDIS_REPLY_ARRAY) {
		r->errors++;
		log_warnx("redis: XCLAIM failed: %.*s", rep->str != NULL ?
		    (int)rep->len : 0, rep->str != NULL ? rep->str : "");
		redis_in_op_done(r);
		return;
	}
	redis_in_batch_begin(r, rep);
	for (i = 0; i < rep->elements; i++) {
		/* Redis < 7 answers nil for entries deleted meanwhile. */
		if (rep->element[i]->type == REDIS_REPLY_NIL)
			continue;
		n++;
		if (redis_in_entry(r, rep->element[i]) != 0) {
			redis_in_batch_end(r);
			redis_in_fail(r, "XCLAIM (unexpected answer)", NULL);
			return;
		}
	}
	redis_in_batch_end(r);
	r->claimed += n;
	if (n > 0)
		log_info("redis: reclaimed idle entries of other consumers "
		    "count=%zu stream=%s", n, r->stream);
	redis_in_op_done(r);
}

/*
 * A page of idle pending entries, [[id, consumer, idle ms, deliveries],
 * ...]: claim the ones that belong to another consumer. Without the IDLE
 * filter (Redis < 6.2) the idle time is checked here.
 */
static void
redis_house_idle_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;
	const redisReply *e;
	const char **argv;
	size_t *alen, i, n = 0;
	long long idle_ms = (long long)(r->d->conf->redis_claim_idle * 1000);
	struct sid id;
	char idle[32];

	if (redis_in_answer(r, rep) != 0)
		return;
	if (rep->type == REDIS_REPLY_ERROR &&
	    strncmp(rep->str, "NOGROUP", 7) == 0) {
		/* The group is gone: not an old server; set it up again. */
		redis_in_fail(r, "XPENDING (claim)", rep);
		return;
	}
	if (rep->type != REDIS_REPLY_ARRAY) {
		if (!r->no_idle_filter && rep->type == REDIS_REPLY_ERROR) {
			log_info("redis: XPENDING has no IDLE filter (%.*s): "
			    "filtering idle entries here", (int)rep->len,
			    rep->str);
			r->no_idle_filter = 1;
			r->next_claim = 0;
		} else {
			r->errors++;
			redis_house_claim_later(r);
		}
		redis_in_op_done(r);
		return;
	}
	argv = xreallocarray(NULL, rep->elements + 5, sizeof *argv);
	alen = xreallocarray(NULL, rep->elements + 5, sizeof *alen);
	snprintf(idle, sizeof idle, "%lld", idle_ms);
	argv[n++] = "XCLAIM";
	argv[n++] = r->stream;
	argv[n++] = r->group;
	argv[n++] = r->consumer;
	argv[n++] = idle;
	for (i = 0; i < n; i++)
		alen[i] = strlen(argv[i]);
	for (i = 0; i < rep->elements; i++) {
		e = rep->element[i];
		if (e->type != REDIS_REPLY_ARRAY || e->elements < 4 ||
		    redis_in_sid_reply(e->element[0], &id) != 0 ||
		    e->element[1]->type != REDIS_REPLY_STRING ||
		    e->element[2]->type != REDIS_REPLY_INTEGER)
			continue;
		r->claim_cursor = id;
		if (strcmp(e->element[1]->str, r->consumer) == 0 ||
		    e->element[2]->integer < idle_ms)
			continue;
		argv[n] = e->element[0]->str;
		alen[n++] = e->element[0]->len;
	}
	if (n > 5 && redis_in_argv(r, redis_house_claimed_cb, NULL, (int)n,
	    argv, alen) == 0)
		r->ops++;
	free(argv);
	free(alen);
	/* A full page may hide more: go on soon, else rest. */
	if (rep->elements < r->d->conf->redis_batch)
		redis_house_claim_later(r);
	else
		r->next_claim = 0;
	redis_in_op_done(r);
}

void
redis_house_claim(struct redis_in *r)
{
	char from[SID_BUF];
	long long batch = r->d->conf->redis_batch;
	int rc;

	if (r->claim_cursor.ms == 0 && r->claim_cursor.seq == 0)
		strcpy(from, "-");
	else
		redis_in_sid_fmt(redis_in_sid_next(r->claim_cursor), from);
	if (r->no_idle_filter)
		rc = redis_in_cmd(r, redis_house_idle_cb, NULL,
		    "XPENDING %s %s %s + %lld", r->stream, r->group, from,
		    batch);
	else
		rc = redis_in_cmd(r, redis_house_idle_cb, NULL,
		    "XPENDING %s %s IDLE %lld %s + %lld", r->stream, r->group,
		    (long long)(r->d->conf->redis_claim_idle * 1000), from,
		    batch);
	if (rc == 0)
		r->ops++;
}

static void
redis_house_lagscan_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;

	if (redis_in_answer(r, rep) != 0)
		return;
	if (rep->type == REDIS_REPLY_ARRAY) {
		r->lag = (int64_t)rep->elements;
		r->lag_capped = rep->elements >= REDIS_IN_LAG_SCAN;
	}
	redis_in_op_done(r);
}

static const redisReply *
redis_house_field(const redisReply *map, const char *name)
{
	size_t i;

	if (map == NULL || map->type != REDIS_REPLY_ARRAY)
		return NULL;
	for (i = 0; i + 1 < map->elements; i += 2)
		if (map->element[i]->type == REDIS_REPLY_STRING &&
		    strcmp(map->element[i]->str, name) == 0)
			return map->element[i + 1];
	return NULL;
}

/* XINFO STREAM: what lag and trims are judged against. */
static void
redis_house_stream_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;
	const redisReply *v, *first;

	if (redis_in_answer(r, rep) != 0)
		return;
	r->info_ok = 0;
	r->info_added = -1;
	r->info_first.ms = r->info_first.seq = 0;
	if (rep->type == REDIS_REPLY_ARRAY &&
	    redis_in_sid_reply(redis_house_field(rep, "last-generated-id"),
	    &r->info_lastgen) == 0 &&
	    (v = redis_house_field(rep, "length")) != NULL &&
	    v->type == REDIS_REPLY_INTEGER) {
		r->info_ok = 1;
		r->info_len = v->integer;
		v = redis_house_field(rep, "entries-added");
		if (v != NULL && v->type == REDIS_REPLY_INTEGER)
			r->info_added = v->integer;
		first = redis_house_field(rep, "first-entry");
		if (first != NULL && first->type == REDIS_REPLY_ARRAY &&
		    first->elements == 2)
			redis_in_sid_reply(first->element[0], &r->info_first);
	}
	redis_in_op_done(r);
}

/*
 * Entries trimmed before the group read them: seen when the first entry
 * left is past the group's last delivered one. Redis 7 counts entries
 * added and entries read; what neither the stream holds nor the group
 * read was trimmed unread. trim_gap keeps what is already counted, as
 * Redis keeps the gap in its lag for good.
 */
static void
redis_house_trims(struct redis_in *r, struct sid delivered, int64_t read)
{
	char a[SID_BUF], b[SID_BUF];
	int64_t gap, n;

	if (r->info_added < 0 || read < 0)
		return;
	gap = r->info_added - read;
	if (redis_in_sid_cmp(delivered, r->info_lastgen) >= 0) {
		/* Caught up: the whole gap is old trims, counted or not. */
		r->trim_gap = gap;
		return;
	}
	if (r->info_first.ms == 0 && r->info_first.seq == 0)
		return;
	if (redis_in_sid_cmp(r->info_first, delivered) <= 0)
		return;
	n = gap - r->info_len - r->trim_gap;
	if (n <= 0)
		return;
	r->trim_gap += n;
	r->trimmed[TRIM_UNDELIVERED] += (uint64_t)n;
	log_warnx("redis: entries trimmed before they were delivered count=%"
	    PRId64 " after=%s before=%s stream=%s", n,
	    redis_in_sid_fmt(delivered, a), redis_in_sid_fmt(r->info_first, b),
	    r->stream);
}

/*
 * XINFO GROUPS: Redis 7's lag less the trims it keeps counting, 0 once
 * the group read the newest entry; without a lag, count what is left.
 */
static void
redis_house_info_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;
	const redisReply *g, *name, *lag, *ld, *rd;
	struct sid last;
	char from[SID_BUF];
	int64_t v;
	size_t i;

	if (redis_in_answer(r, rep) != 0)
		return;
	r->next_info = daemon_now() + REDIS_IN_INFO_EVERY;
	if (rep->type != REDIS_REPLY_ARRAY) {
		redis_in_op_done(r);
		return;
	}
	for (i = 0; i < rep->elements; i++) {
		g = rep->element[i];
		name = redis_house_field(g, "name");
		if (name == NULL || name->type != REDIS_REPLY_STRING ||
		    strcmp(name->str, r->group) != 0)
			continue;
		ld = redis_house_field(g, "last-delivered-id");
		if (redis_in_sid_reply(ld, &last) != 0)
			break;
		rd = redis_house_field(g, "entries-read");
		if (r->info_ok)
			redis_house_trims(r, last, rd != NULL &&
			    rd->type == REDIS_REPLY_INTEGER ? rd->integer : -1);
		lag = redis_house_field(g, "lag");
		if (r->info_ok &&
		    redis_in_sid_cmp(last, r->info_lastgen) >= 0) {
			r->lag = 0;
			r->lag_capped = 0;
		} else if (r->info_ok && (r->info_first.ms != 0 ||
		    r->info_first.seq != 0) &&
		    redis_in_sid_cmp(r->info_first, last) > 0) {
			r->lag = r->info_len;	/* nothing left was read */
			r->lag_capped = 0;
		} else if (lag != NULL && lag->type == REDIS_REPLY_INTEGER) {
			v = lag->integer - r->trim_gap;
			if (r->info_ok && v > r->info_len)
				v = r->info_len;
			r->lag = v < 0 ? 0 : v;
			r->lag_capped = 0;
		} else if (redis_in_cmd(r, redis_house_lagscan_cb, NULL,
		    "XRANGE %s %s + COUNT %d", r->stream,
		    redis_in_sid_fmt(redis_in_sid_next(last), from),
		    REDIS_IN_LAG_SCAN) == 0)
			r->ops++;
		break;
	}
	redis_in_op_done(r);
}

/* XPENDING summary: [count, min, max, [[consumer, count], ...]]. */
static void
redis_house_summary_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;
	const redisReply *list, *c;
	size_t i;

	if (redis_in_answer(r, rep) != 0)
		return;
	if (rep->type == REDIS_REPLY_ARRAY && rep->elements == 4 &&
	    rep->element[0]->type == REDIS_REPLY_INTEGER) {
		r->pending = rep->element[0]->integer;
		r->pending_own = 0;
		list = rep->element[3];
		for (i = 0; list->type == REDIS_REPLY_ARRAY &&
		    i < list->elements; i++) {
			c = list->element[i];
			if (c->type == REDIS_REPLY_ARRAY && c->elements == 2 &&
			    c->element[0]->type == REDIS_REPLY_STRING &&
			    c->element[1]->type == REDIS_REPLY_STRING &&
			    strcmp(c->element[0]->str, r->consumer) == 0)
				r->pending_own = strtoll(c->element[1]->str,
				    NULL, 10);
		}
	}
	redis_in_op_done(r);
}

void
redis_house_info(struct redis_in *r)
{
	if (redis_in_cmd(r, redis_house_stream_cb, NULL, "XINFO STREAM %s",
	    r->stream) == 0)
		r->ops++;
	if (redis_in_cmd(r, redis_house_info_cb, NULL, "XINFO GROUPS %s",
	    r->stream) == 0)
		r->ops++;
	if (redis_in_cmd(r, redis_house_summary_cb, NULL, "XPENDING %s %s",
	    r->stream, r->group) == 0)
		r->ops++;
}


/* XGROUP CREATE answer: made where redis_house_setup_cb chose, or there. */
static void
redis_house_group_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;
	char at[SID_BUF], old[SID_BUF];

	if (redis_in_answer(r, rep) != 0)
		return;
	if (rep->type == REDIS_REPLY_ERROR) {
		if (strncmp(rep->str, "BUSYGROUP", 9) != 0) {
			redis_in_fail(r, "XGROUP CREATE", rep);
			return;
		}
		redis_in_setup_done(r);	/* it was there: nothing to say */
		return;
	}
	redis_in_sid_fmt(r->setup_at, at);
	r->made[r->setup_made]++;
	snprintf(r->made_at, sizeof r->made_at, "%s", at);
	switch (r->setup_made) {
	case MADE_END:
		r->start_skipped += (uint64_t)r->setup_len;
		log_info("redis: new consumer group at the stream's end "
		    "(start = end): skipped entries=%" PRId64 " after=%s "
		    "stream=%s group=%s", r->setup_len, at, r->stream,
		    r->group);
		break;
	case MADE_BEGINNING:
		log_info("redis: new consumer group at the stream's beginning "
		    "(start = beginning): entries=%" PRId64 " stream=%s "
		    "group=%s", r->setup_len, r->stream, r->group);
		break;
	case MADE_CHECKPOINT:
		log_warnx("redis: consumer group lost (Redis restarted without "
		    "it, or it was deleted): made again after the last "
		    "checkpointed entry after=%s stream=%s group=%s", at,
		    r->stream, r->group);
		break;
	case MADE_STREAM_START:
		if (r->setup_reset)
			/* A new stream (Redis lost it) or one that lost its
			 * tail. Entries at or below the last applied ID are
			 * taken as applied (read, skipped, counted): never
			 * twice, at the cost of a new stream whose IDs went
			 * back (explicit IDs, a server clock behind). */
			log_warnx("redis: consumer group lost and the stream "
			    "holds nothing as far as the last applied entry "
			    "(Redis restarted without persistence, or lost "
			    "its tail): made again at the stream's start; "
			    "entries at or below the last applied one are "
			    "taken as applied; entries the old stream held "
			    "that were never read are lost with it and "
			    "cannot be counted last_applied=%s below=%" PRId64
			    " stream=%s group=%s", redis_in_sid_fmt(r->last,
			    old), r->setup_len, r->stream, r->group);
		else
			log_warnx("redis: consumer group lost before any "
			    "checkpoint: made again where it first was; "
			    "entries applied already are skipped after=%s "
			    "stream=%s group=%s", at, r->stream, r->group);
		break;
	case MADE_N:
		break;
	}
	r->origin = r->setup_at;
	redis_in_setup_done(r);
}

/*
 * XINFO STREAM before XGROUP CREATE: where a missing group must start.
 * A new group starts at the last generated ID (start = end: exactly the
 * entries counted are skipped, any added meanwhile are read) or at 0. A
 * lost one starts after the checkpoint's last entry, the one saved with
 * the engine state, so everything after it is applied once (what was
 * applied since is read again and skipped by the ID rule), unless the
 * stream never went that far: then it is a new stream (or one that lost
 * its tail), read from 0, what it holds at or below the last applied ID
 * skipped by the same rule (never applied twice).
 */
static void
redis_house_setup_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;
	const redisReply *v;
	struct sid lastgen = { 0, 0 }, ref;
	char at[SID_BUF];
	int zero_cov;

	if (redis_in_answer(r, rep) != 0)
		return;
	r->setup_len = 0;
	if (rep->type == REDIS_REPLY_ERROR) {
		/* No stream yet: it is empty; anything else is a failure. */
		if (strstr(rep->str, "no such key") == NULL) {
			redis_in_fail(r, "XINFO STREAM (setup)", rep);
			return;
		}
	} else if (rep->type != REDIS_REPLY_ARRAY ||
	    redis_in_sid_reply(redis_house_field(rep, "last-generated-id"),
	    &lastgen) != 0 || (v = redis_house_field(rep, "length")) == NULL ||
	    v->type != REDIS_REPLY_INTEGER) {
		redis_in_fail(r, "XINFO STREAM (setup, unexpected answer)",
		    NULL);
		return;
	} else
		r->setup_len = v->integer;
	zero_cov = r->covered.ms == 0 && r->covered.seq == 0;
	r->setup_reset = 0;
	if (!r->had_group && zero_cov &&
	    r->last.ms == 0 && r->last.seq == 0) {
		r->setup_made = r->start_beginning ? MADE_BEGINNING : MADE_END;
		r->setup_at = r->start_beginning ? (struct sid){ 0, 0 } :
		    lastgen;
	} else {
		ref = zero_cov ? r->last : r->covered;
		if (redis_in_sid_cmp(ref, lastgen) > 0) {
			r->setup_made = MADE_STREAM_START;
			r->setup_at = (struct sid){ 0, 0 };
			r->setup_reset = 1;
		} else if (zero_cov) {
			r->setup_made = MADE_STREAM_START;
			r->setup_at = r->origin;
		} else {
			r->setup_made = MADE_CHECKPOINT;
			r->setup_at = r->covered;
		}
	}
	redis_in_cmd(r, redis_house_group_cb, NULL,
	    "XGROUP CREATE %s %s %s MKSTREAM", r->stream, r->group,
	    redis_in_sid_fmt(r->setup_at, at));
}

void
redis_house_setup(struct redis_in *r)
{
	redis_in_cmd(r, redis_house_setup_cb, NULL, "XINFO STREAM %s",
	    r->stream);
}
