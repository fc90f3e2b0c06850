/*
 * redis_house.c: the Redis consumer's housekeeping, run one step at a
 * time between two blocking reads (redis_in.c decides when):
 *  - acknowledging what the last checkpoint covers: XPENDING - <covered>
 *    for our consumer, then XACK of the IDs it lists;
 *  - dead letters: an entry is copied with its fields plus origin and
 *    reason to the dead-letter stream (XADD), and acknowledged only once
 *    the copy is stored;
 *  - entries delivered more than max_deliveries times (XPENDING IDLE with
 *    delivery counts, then XCLAIM to get their fields) become dead letters;
 *  - entries idle on dead consumers are reclaimed (XAUTOCLAIM) and applied
 *    like any other, the checkpoint's ID rule included;
 *  - lag (XINFO GROUPS, or counting entries after the group's last
 *    delivered one when Redis gives no lag) and pending counts (XPENDING
 *    summary) for metrics and STATUS=.
 * Every command here counts in r->ops; the next read waits for zero.
 */
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/log.h"
#include "redis_in_int.h"

const char *const redis_in_dead_names[DEAD_N] = {
	"no_records", "max_deliveries"
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

/* Apply the lines of one entry's `records` field. */

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

static void
redis_house_autoclaim_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;
	const redisReply *list;
	struct sid next;
	size_t i;
	double every;

	if (redis_in_answer(r, rep) != 0)
		return;
	every = r->d->conf->redis_claim_idle / 2;
	every = every < 1 ? 1 : every > 30 ? 30 : every;
	r->next_claim = daemon_now() + every;
	if (rep->type != REDIS_REPLY_ARRAY || rep->elements < 2 ||
	    redis_in_sid_reply(rep->element[0], &next) != 0 ||
	    rep->element[1]->type != REDIS_REPLY_ARRAY) {
		r->errors++;
		log_warnx("redis: XAUTOCLAIM failed: %.*s", rep->str != NULL ?
		    (int)rep->len : 0, rep->str != NULL ? rep->str : "");
		redis_in_op_done(r);
		return;
	}
	list = rep->element[1];
	for (i = 0; i < list->elements; i++) {
		/* Redis 6.2 answers nil for entries deleted meanwhile. */
		if (list->element[i]->type == REDIS_REPLY_NIL)
			continue;
		r->claimed++;
		if (redis_in_entry(r, list->element[i], 0) != 0) {
			redis_in_fail(r, "XAUTOCLAIM (unexpected answer)",
			    NULL);
			return;
		}
	}
	if (list->elements > 0)
		log_info("redis: reclaimed idle entries count=%zu stream=%s",
		    list->elements, r->stream);
	r->claim_cursor = next;
	if (next.ms != 0 || next.seq != 0)
		r->next_claim = 0;	/* more to scan: go on soon */
	redis_in_op_done(r);
}

static void
redis_house_autoclaim(struct redis_in *r)
{
	char cur[SID_BUF];

	if (redis_in_cmd(r, redis_house_autoclaim_cb, NULL,
	    "XAUTOCLAIM %s %s %s %lld %s COUNT %lld", r->stream, r->group,
	    r->consumer, (long long)(r->d->conf->redis_claim_idle * 1000),
	    redis_in_sid_fmt(r->claim_cursor, cur),
	    (long long)r->d->conf->redis_batch) == 0)
		r->ops++;
}

/* XCLAIM answer for entries over max_deliveries: dead-letter them. */
static void
redis_house_poison_claim_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;
	const redisReply *e;
	struct sid id;
	size_t i;

	if (redis_in_answer(r, rep) != 0)
		return;
	if (rep->type != REDIS_REPLY_ARRAY) {
		r->errors++;
		log_warnx("redis: XCLAIM failed: %.*s", rep->str != NULL ?
		    (int)rep->len : 0, rep->str != NULL ? rep->str : "");
		redis_in_op_done(r);
		return;
	}
	for (i = 0; i < rep->elements; i++) {
		e = rep->element[i];
		if (e->type != REDIS_REPLY_ARRAY || e->elements != 2 ||
		    redis_in_sid_reply(e->element[0], &id) != 0)
			continue;
		if (e->element[1]->type == REDIS_REPLY_NIL) {
			r->deleted++;
			redis_house_ack_one(r, id);
		} else
			redis_house_dead_letter(r, id, e->element[1],
			    DEAD_MAX_DELIVERIES);
	}
	redis_in_op_done(r);
}

/* Idle entries of every consumer with their delivery counts. */
static void
redis_house_idle_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;
	const redisReply *e;
	const char **argv;
	size_t *alen, i, n = 0;
	struct sid id;
	char idle[32];

	if (redis_in_answer(r, rep) != 0)
		return;
	if (rep->type != REDIS_REPLY_ARRAY) {
		/* Servers before 6.2 have no IDLE filter: skip the poison
		 * check there, reclaiming still works. */
		if (!r->no_idle_filter)
			log_warnx("redis: XPENDING IDLE failed (%.*s); no "
			    "delivery-count check", rep->str != NULL ?
			    (int)rep->len : 0, rep->str != NULL ? rep->str :
			    "");
		r->no_idle_filter = 1;
		redis_house_autoclaim(r);
		redis_in_op_done(r);
		return;
	}
	argv = xreallocarray(NULL, rep->elements + 5, sizeof *argv);
	alen = xreallocarray(NULL, rep->elements + 5, sizeof *alen);
	snprintf(idle, sizeof idle, "%lld",
	    (long long)(r->d->conf->redis_claim_idle * 1000));
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
		    e->element[3]->type != REDIS_REPLY_INTEGER)
			continue;
		/* Claiming delivers it once more. Entries at or below our
		 * last applied one are done, not poison. */
		if (e->element[3]->integer <
		    (long long)r->d->conf->redis_max_deliveries ||
		    redis_in_sid_cmp(id, r->last) <= 0)
			continue;
		argv[n] = e->element[0]->str;
		alen[n++] = e->element[0]->len;
	}
	if (n > 5 && redis_in_argv(r, redis_house_poison_claim_cb, NULL, (int)n,
	    argv, alen) == 0)
		r->ops++;
	free(argv);
	free(alen);
	redis_house_autoclaim(r);
	redis_in_op_done(r);
}

void
redis_house_claim(struct redis_in *r)
{
	if (r->no_idle_filter) {
		redis_house_autoclaim(r);
		return;
	}
	if (redis_in_cmd(r, redis_house_idle_cb, NULL,
	    "XPENDING %s %s IDLE %lld - + %lld", r->stream, r->group,
	    (long long)(r->d->conf->redis_claim_idle * 1000),
	    (long long)r->d->conf->redis_batch) == 0)
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

/* XINFO GROUPS: lag when Redis 7 knows it, else count what is left. */
static void
redis_house_info_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;
	const redisReply *g, *name, *lag, *ld;
	struct sid last;
	char from[SID_BUF];
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
		lag = redis_house_field(g, "lag");
		if (lag != NULL && lag->type == REDIS_REPLY_INTEGER) {
			r->lag = lag->integer;
			r->lag_capped = 0;
			break;
		}
		ld = redis_house_field(g, "last-delivered-id");
		if (redis_in_sid_reply(ld, &last) == 0 && redis_in_cmd(r,
		    redis_house_lagscan_cb, NULL, "XRANGE %s %s + COUNT %d",
		    r->stream, redis_in_sid_fmt(redis_in_sid_next(last), from),
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
	if (redis_in_cmd(r, redis_house_info_cb, NULL, "XINFO GROUPS %s",
	    r->stream) == 0)
		r->ops++;
	if (redis_in_cmd(r, redis_house_summary_cb, NULL, "XPENDING %s %s",
	    r->stream, r->group) == 0)
		r->ops++;
}

/*
 * The steady loop: one housekeeping step when one is due, else the next
 * blocking read. Nothing is sent while a read or a step is out, so the
 * steps never queue behind a block.
 */
