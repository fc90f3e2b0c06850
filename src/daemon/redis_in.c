/*
 * redis_in.c: the Redis stream consumer, on hiredis's async API attached
 * to the daemon's event base. Each stream entry carries a field `records`
 * with one or more protocol lines separated by '\n' (producers batch);
 * the lines go to ingest.c like any other input.
 *
 * Exactly once across crashes rests on three rules:
 *  - entries are applied in ID order and the checkpoint stores the last
 *    applied ID together with the engine state it produced;
 *  - an entry is acknowledged (XACK) only once a checkpoint covers it, so
 *    anything applied after the last checkpoint is still pending in Redis
 *    when we die;
 *  - at start we first read back this consumer's own pending entries: the
 *    ones with an ID at or below the checkpoint's are already in the
 *    restored state and are only acknowledged, the later ones are applied.
 * The rules assume one logical consumer per group (one daemon, whose
 * consumer name may change): entries reclaimed from other consumers obey
 * the same ID rule. redis_lease.c keeps it so: nothing is read or applied
 * unless this daemon holds the group's lease; under [redis] ha the reads
 * go through its fenced script and a new holder adopts the old one's
 * checkpoint before reading the shared consumer's pending entries back.
 *
 * One connection carries everything. Between two blocking reads the
 * consumer runs its housekeeping (redis_house.c), one step at a time:
 * acknowledgements, dead letters, reclaiming entries idle on other
 * consumers (never on itself: its own pending entries are applied and
 * wait for a checkpoint), lag and pending counts.
 * Each connection starts by making the group if it is missing
 * (redis_house_setup): a new one where [redis] start says, a lost one
 * (Redis restarted without it, XGROUP DESTROY) just after the entry the
 * checkpoint holds, never at the stream's end.
 *
 * Poison: Redis's delivery counter is not used, because every restart
 * re-reads our own pending entries and would raise it without anything
 * having failed. The daemon counts failures itself: before applying a
 * batch of entries it writes their ID range to a small file in the state
 * directory (redis-applying) and marks it done after; a start that finds
 * a batch not done knows the last run died applying one of its entries,
 * and marks that batch entry by entry when it comes again, so a second
 * death names the entry. An entry that failed so
 * max_deliveries times goes to the dead-letter stream instead of being
 * applied once more, as does an entry without `records` (nothing to
 * apply). Bad lines inside `records` cost only themselves: they are
 * counted and logged by ingest.c like any input's.
 *
 * The connection comes back after any failure with exponential backoff
 * (100 ms doubling to 10 s); a watchdog drops it when an answer is late
 * (a blocking read gets block + 5 s). Freeing the hiredis context never
 * happens inside its own callbacks: failures found there are handed to a
 * deferred event.
 */
#include <inttypes.h>
#include <math.h>
#include <limits.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <event2/event.h>
#include <hiredis/hiredis.h>
#include <hiredis/async.h>
#include <hiredis/adapters/libevent.h>

#include "stopcock/addr.h"
#include "stopcock/log.h"
#include "redis_in_int.h"

static void	redis_in_connect(struct redis_in *);
static void	redis_in_trim_flush(struct redis_in *);

static const char *
redis_in_state_name(enum redis_in_state s)
{
	switch (s) {
	case RS_IDLE:
		return "idle";
	case RS_CONNECTING:
		return "connecting";
	case RS_SETUP:
		return "setup";
	case RS_PENDING:
		return "pending";
	case RS_STEADY:
		return "steady";
	case RS_STANDBY:
		return "standby";
	case RS_STOPPED:
		return "stopped";
	}
	return "?";
}

/* The one place the consumer changes state. */
static void
redis_in_set_state(struct redis_in *r, enum redis_in_state new)
{
	if (r->state == new)
		return;
	if (new == RS_STEADY || r->state == RS_STEADY || new == RS_IDLE)
		log_info("redis: %s -> %s stream=%s consumer=%s last=%s",
		    redis_in_state_name(r->state), redis_in_state_name(new),
		    r->stream, r->consumer, redis_in_last_id(r));
	else
		log_debug("redis: %s -> %s stream=%s",
		    redis_in_state_name(r->state), redis_in_state_name(new),
		    r->stream);
	r->state = new;
}

/* Schedule a reconnection after the current backoff, then double it. */
static void
redis_in_retry(struct redis_in *r)
{
	struct timeval tv;

	if (r->state == RS_STOPPED || evtimer_pending(r->retry_ev, NULL))
		return;
	redis_in_set_state(r, RS_IDLE);
	tv.tv_sec = (time_t)r->backoff;
	tv.tv_usec = (suseconds_t)((r->backoff - tv.tv_sec) * 1e6);
	evtimer_add(r->retry_ev, &tv);
	r->backoff *= 2;
	if (r->backoff > REDIS_IN_BACKOFF_MAX)
		r->backoff = REDIS_IN_BACKOFF_MAX;
}

/* Drop the connection now. Never from inside a hiredis callback. */
static void
redis_in_drop(struct redis_in *r, const char *why)
{
	redisAsyncContext *ac = r->ac;

	if (ac == NULL)
		return;
	log_warnx("redis: dropping the connection: %s address=%s", why,
	    r->address);
	redisAsyncFree(ac);	/* runs pending callbacks with NULL replies */
	r->ac = NULL;
	r->outstanding = 0;
	r->reading = 0;
	r->ops = 0;
	redis_in_retry(r);
}

static void
redis_in_fail_cb(evutil_socket_t fd, short what, void *arg)
{
	struct redis_in *r = arg;
	const char *why = r->fail_why != NULL ? r->fail_why : "protocol error";

	r->fail_why = NULL;
	redis_in_drop(r, why);
}

/* From inside a callback: log now, drop the connection just after. */
void
redis_in_fail(struct redis_in *r, const char *cmd, const redisReply *reply)
{
	r->errors++;
	log_warnx("redis: %s failed: %.*s stream=%s", cmd,
	    reply != NULL && reply->str != NULL ? (int)reply->len : 7,
	    reply != NULL && reply->str != NULL ? reply->str : "no data",
	    r->stream);
	event_active(r->fail_ev, EV_TIMEOUT, 0);
}

/* Every callback starts here: the answer arrived (or the link died). */
int
redis_in_answer(struct redis_in *r, const redisReply *reply)
{
	if (r->outstanding > 0)
		r->outstanding--;
	if (reply == NULL || r->ac == NULL || r->state == RS_STOPPED)
		return -1;
	r->wait_since = daemon_now();
	return 0;
}

static int
redis_in_sent(struct redis_in *r, int rc, const char *what)
{
	if (rc != REDIS_OK) {
		r->errors++;
		log_warnx("redis: cannot send %s stream=%s", what, r->stream);
		event_active(r->fail_ev, EV_TIMEOUT, 0);
		return -1;
	}
	if (r->outstanding++ == 0)
		r->wait_since = daemon_now();
	return 0;
}

int
redis_in_cmd(struct redis_in *r, redisCallbackFn *fn, void *priv,
    const char *fmt, ...)
{
	va_list ap;
	int rc;

	if (r->ac == NULL)
		return -1;
	va_start(ap, fmt);
	rc = redisvAsyncCommand(r->ac, fn, priv, fmt, ap);
	va_end(ap);
	return redis_in_sent(r, rc, fmt);
}

int
redis_in_argv(struct redis_in *r, redisCallbackFn *fn, void *priv, int argc,
    const char **argv, const size_t *lens)
{
	if (r->ac == NULL)
		return -1;
	return redis_in_sent(r, redisAsyncCommandArgv(r->ac, fn, priv, argc,
	    argv, lens), argv[0]);
}

/* A housekeeping step ended: maybe the next one, or the next read. */
void
redis_in_op_done(struct redis_in *r)
{
	if (r->ops > 0)
		r->ops--;
	redis_in_next(r);
}

void
redis_in_batch_begin(struct redis_in *r, const redisReply *list)
{
	struct sid id, first = { 0, 0 }, last = { 0, 0 };
	size_t i, n = 0;

	r->mark_each = 0;
	for (i = 0; i < list->elements; i++) {
		const redisReply *e = list->element[i];

		if (e->type != REDIS_REPLY_ARRAY || e->elements != 2 ||
		    redis_in_sid_reply(e->element[0], &id) != 0)
			continue;
		if (n++ == 0)
			first = id;
		last = id;
		if (redis_in_guard_failures(r, id) > 0)
			r->mark_each = 1;
	}
	if (n > 0 && !r->mark_each)
		redis_in_guard_range(r, first, last, 0);
}

void
redis_in_batch_end(struct redis_in *r)
{
	redis_in_guard_write(r, "D");
	r->mark_each = 0;
	redis_in_trim_flush(r);
}

/* The string value of field name in an entry's fields, or NULL. */
static const redisReply *
redis_in_field(const redisReply *fields, const char *name)
{
	size_t i, len = strlen(name);

	for (i = 0; i + 1 < fields->elements; i += 2)
		if (fields->element[i]->type == REDIS_REPLY_STRING &&
		    fields->element[i]->len == len &&
		    memcmp(fields->element[i]->str, name, len) == 0)
			return fields->element[i + 1]->type ==
			    REDIS_REPLY_STRING ? fields->element[i + 1] : NULL;
	return NULL;
}

static void
redis_in_apply(struct redis_in *r, struct sid id, const redisReply *fields,
    const redisReply *v)
{
	const redisReply *pr, *mid, *ts, *sig;

	if (r->mark_each)
		redis_in_guard_range(r, id, id, redis_in_guard_failures(r, id));
	if (auth_signed(r->d->conf, SRC_REDIS)) {
		/* a signed batch: producer, id, ts, signature beside records
		 * (frame.h); refused whole or applied whole */
		pr = redis_in_field(fields, "producer");
		mid = redis_in_field(fields, "id");
		ts = redis_in_field(fields, "ts");
		sig = redis_in_field(fields, "signature");
		(void)auth_fields(r->d, SRC_REDIS,
		    pr ? pr->str : NULL, pr ? pr->len : 0,
		    mid ? mid->str : NULL, mid ? mid->len : 0,
		    ts ? ts->str : NULL, ts ? ts->len : 0,
		    sig ? sig->str : NULL, sig ? sig->len : 0, v->str, v->len);
	} else
		ingest_lines(r->d, SRC_REDIS, v->str, v->len);
	r->last = id;
	r->entries++;
}

static void
redis_in_trim_flush(struct redis_in *r)
{
	char a[SID_BUF], b[SID_BUF];

	if (r->trim_n == 0)
		return;
	r->trimmed[TRIM_PENDING] += r->trim_n;
	log_warnx("redis: entries trimmed before they were applied count=%"
	    PRIu64 " first=%s last=%s stream=%s", r->trim_n,
	    redis_in_sid_fmt(r->trim_first, a),
	    redis_in_sid_fmt(r->trim_last, b), r->stream);
	r->trim_n = 0;
}

/*
 * One delivered entry [id, [field, value, ...]] (or [id, nil] when it
 * was deleted after delivery): applied, skipped (the checkpoint holds
 * it), or dead-lettered. Returns -1 on a malformed reply.
 */
int
redis_in_entry(struct redis_in *r, const redisReply *e)
{
	const redisReply *fields, *f, *v;
	struct sid id;
	unsigned failures;
	char buf[SID_BUF];
	size_t i;

	/* [id] alone: the same, passed through the fenced read's script
	 * (Lua drops the nil at the end of a list). */
	if (e->type != REDIS_REPLY_ARRAY || e->elements < 1 ||
	    e->elements > 2 || redis_in_sid_reply(e->element[0], &id) != 0)
		return -1;
	fields = e->elements == 2 ? e->element[1] : NULL;
	if (fields == NULL || fields->type == REDIS_REPLY_NIL) {
		/* Trimmed or deleted while pending: nothing to apply. Above
		 * the checkpoint it is lost, and said so. */
		r->deleted++;
		if (redis_in_sid_cmp(id, r->last) > 0) {
			if (r->trim_n++ == 0)
				r->trim_first = id;
			r->trim_last = id;
		}
		redis_house_ack_one(r, id);
		return 0;
	}
	if (fields->type != REDIS_REPLY_ARRAY)
		return -1;
	if (redis_in_sid_cmp(id, r->last) <= 0) {
		/* Already in the restored state; XACKed by the sweep
		 * once a checkpoint covers it. */
		r->skipped++;
		r->ack_due = 1;
		return 0;
	}
	/* A death inside a batch names no entry yet: only one marked
	 * entry by entry may reach the limit (no innocent neighbours). */
	failures = redis_in_guard_failures(r, id);
	if (failures >= r->d->conf->redis_max_deliveries &&
	    redis_in_sid_cmp(r->suspect, r->suspect_last) == 0) {
		log_warnx("redis: entry failed to apply %u times (the daemon "
		    "died applying it): not applying it again entry=%s",
		    failures, redis_in_sid_fmt(id, buf));
		redis_house_dead_letter(r, id, fields, DEAD_APPLY_FAILED);
		return 0;
	}
	for (i = 0; i + 1 < fields->elements; i += 2) {
		f = fields->element[i];
		v = fields->element[i + 1];
		if (f->type == REDIS_REPLY_STRING && f->len == 7 &&
		    memcmp(f->str, "records", 7) == 0 &&
		    v->type == REDIS_REPLY_STRING) {
			redis_in_apply(r, id, fields, v);
			return 0;
		}
	}
	redis_house_dead_letter(r, id, fields, DEAD_NO_RECORDS);
	return 0;
}

/* Entries of an XREADGROUP answer: [[stream, [entry, ...]]] or nil. */
static int
redis_in_entries(struct redis_in *r, const redisReply *rep, size_t *count,
    struct sid *lastseen)
{
	const redisReply *s, *list;
	size_t i, j;

	*count = 0;
	if (rep->type == REDIS_REPLY_NIL)
		return 0;
	if (rep->type != REDIS_REPLY_ARRAY)
		return -1;
	for (i = 0; i < rep->elements; i++) {
		s = rep->element[i];
		if (s->type != REDIS_REPLY_ARRAY || s->elements != 2 ||
		    s->element[1]->type != REDIS_REPLY_ARRAY)
			return -1;
		list = s->element[1];
		redis_in_batch_begin(r, list);
		for (j = 0; j < list->elements; j++) {
			if (redis_in_entry(r, list->element[j]) != 0) {
				redis_in_batch_end(r);
				return -1;
			}
			if (lastseen != NULL)
				redis_in_sid_reply(list->element[j]->element[0],
				    lastseen);
			(*count)++;
		}
		redis_in_batch_end(r);
	}
	return 0;
}

static void	redis_in_pel_next(struct redis_in *);

/*
 * An XREADGROUP answer, plain or from the fenced read (redis_lease.c):
 * new entries (pel 0), or our own pending ones read back from the
 * cursor (pel 1). Nothing is applied once the lease is not sure.
 */
void
redis_in_read_reply(struct redis_in *r, const redisReply *rep, int pel)
{
	size_t n;

	if (!redis_lease_valid(r->lease)) {
		redis_in_suspend(r, "lease not confirmed");
		return;
	}
	if (rep->type == REDIS_REPLY_ERROR) {
		if (!pel && strncmp(rep->str, "NOGROUP", 7) == 0) {
			/* The stream or group was deleted under us. */
			log_warnx("redis: group gone, creating it again "
			    "stream=%s group=%s", r->stream, r->group);
			event_active(r->fail_ev, EV_TIMEOUT, 0);
			return;
		}
		redis_in_fail(r, pel ? "XREADGROUP (pending)" : "XREADGROUP",
		    rep);
		return;
	}
	if (redis_in_entries(r, rep, &n, pel ? &r->pel_cursor : NULL) != 0) {
		redis_in_fail(r, "XREADGROUP (unexpected answer)", NULL);
		return;
	}
	if (!pel) {
		redis_in_next(r);
		return;
	}
	if (n < r->d->conf->redis_batch || n == 0) {
		log_info("redis: own pending entries read back stream=%s "
		    "applied=%" PRIu64 " skipped=%" PRIu64, r->stream,
		    r->entries, r->skipped);
		redis_in_set_state(r, RS_STEADY);
		r->ack_due = 1;
		r->next_claim = 0;
		r->next_info = 0;
		redis_in_next(r);
		return;
	}
	redis_in_pel_next(r);
}

static void
redis_in_read_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;

	r->reading = 0;
	if (redis_in_answer(r, reply) != 0)
		return;
	redis_in_read_reply(r, reply, 0);
}

static void
redis_in_pel_read_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;

	if (redis_in_answer(r, reply) != 0)
		return;
	redis_in_read_reply(r, reply, 1);
}

/*
 * Next batch of our own pending entries (those delivered to us before a
 * crash or a lost connection), from just after the cursor.
 */
static void
redis_in_pel_next(struct redis_in *r)
{
	char cur[SID_BUF];

	if (r->ha) {
		redis_lease_read(r->lease, 1);
		return;
	}
	redis_in_cmd(r, redis_in_pel_read_cb, NULL,
	    "XREADGROUP GROUP %s %s COUNT %lld STREAMS %s %s", r->group,
	    r->consumer, (long long)r->d->conf->redis_batch, r->stream,
	    redis_in_sid_fmt(r->pel_cursor, cur));
}

void
redis_in_setup_done(struct redis_in *r)
{
	r->had_group = 1;
	r->backoff = REDIS_IN_BACKOFF_MIN;
	r->pel_cursor.ms = r->pel_cursor.seq = 0;
	redis_in_set_state(r, RS_PENDING);
	redis_in_pel_next(r);
}

static void
redis_in_connect_cb(const redisAsyncContext *cac, int status)
{
	struct redis_in *r = cac->data;

	if (status != REDIS_OK) {
		/* hiredis frees the context after this callback. */
		log_warnx("redis: cannot connect: %s address=%s", cac->errstr,
		    r->address);
		r->ac = NULL;
		r->outstanding = 0;
		redis_in_retry(r);
		return;
	}
	log_info("redis: connected address=%s", r->address);
	redis_in_set_state(r, RS_SETUP);
	redis_house_setup(r);
}

static void
redis_in_disconnect_cb(const redisAsyncContext *cac, int status)
{
	struct redis_in *r = cac->data;

	r->ac = NULL;
	r->outstanding = 0;
	r->reading = 0;
	r->ops = 0;
	if (r->state == RS_STOPPED)
		return;
	if (status != REDIS_OK)
		log_warnx("redis: connection lost: %s address=%s",
		    cac->errstr, r->address);
	redis_in_retry(r);
}

static void
redis_in_connect(struct redis_in *r)
{
	redisAsyncContext *ac;

	if (r->state == RS_STOPPED || r->ac != NULL)
		return;
	if (!redis_lease_valid(r->lease)) {
		/* redis_in_resume connects once the lease is ours. */
		redis_in_set_state(r, RS_STANDBY);
		return;
	}
	if (r->unix_path != NULL)
		ac = redisAsyncConnectUnix(r->unix_path);
	else
		ac = redisAsyncConnect(r->host, r->port);
	if (ac == NULL || ac->err) {
		log_warnx("redis: cannot connect: %s address=%s",
		    ac != NULL ? ac->errstr : "out of memory", r->address);
		if (ac != NULL)
			redisAsyncFree(ac);
		redis_in_retry(r);
		return;
	}
	ac->data = r;
	if (redisLibeventAttach(ac, r->d->base) != REDIS_OK) {
		log_warnx("redis: cannot attach to the event loop");
		redisAsyncFree(ac);
		redis_in_retry(r);
		return;
	}
	redisAsyncSetConnectCallback(ac, redis_in_connect_cb);
	redisAsyncSetDisconnectCallback(ac, redis_in_disconnect_cb);
	r->ac = ac;
	r->connect_since = daemon_now();
	redis_in_set_state(r, RS_CONNECTING);
}

static void
redis_in_retry_cb(evutil_socket_t fd, short what, void *arg)
{
	struct redis_in *r = arg;

	r->reconnects++;
	redis_in_connect(r);
}

static void
redis_in_watchdog_cb(evutil_socket_t fd, short what, void *arg)
{
	struct redis_in *r = arg;
	double now = daemon_now(), limit;
	char why[96];

	if (r->ac == NULL)
		return;
	if (r->state == RS_CONNECTING) {
		if (now - r->connect_since > REDIS_IN_ANSWER)
			redis_in_drop(r, "connect timed out");
		return;
	}
	limit = REDIS_IN_ANSWER + (r->reading ? r->d->conf->redis_block : 0);
	if (r->outstanding > 0 && now - r->wait_since > limit) {
		snprintf(why, sizeof why, "no answer in %.1fs", limit);
		redis_in_drop(r, why);
	}
}

/*
 * The steady loop: one housekeeping step when one is due, else the next
 * blocking read. Nothing is sent while a read or a step is out, so the
 * steps never queue behind a block.
 */
void
redis_in_next(struct redis_in *r)
{
	double now;

	if (r->state != RS_STEADY || r->ac == NULL || r->reading ||
	    r->ops > 0 || r->d->draining)
		return;
	if (!redis_lease_valid(r->lease)) {
		redis_in_suspend(r, "lease not confirmed");
		return;
	}
	now = daemon_now();
	if (r->ack_due) {
		redis_house_sweep(r);
		return;
	}
	/* Under ha every daemon reads as the one consumer: nobody to
	 * claim from, and its pending entries are read back in order. */
	if (!r->ha && now >= r->next_claim) {
		r->next_claim = now + 1;	/* until the answer sets it */
		redis_house_claim(r);
		return;
	}
	if (now >= r->next_info) {
		r->next_info = now + REDIS_IN_INFO_EVERY;
		redis_house_info(r);
		return;
	}
	if (r->ha) {
		redis_lease_read(r->lease, 0);
		return;
	}
	if (redis_in_cmd(r, redis_in_read_cb, NULL,
	    "XREADGROUP GROUP %s %s COUNT %lld BLOCK %lld STREAMS %s >",
	    r->group, r->consumer, (long long)r->d->conf->redis_batch,
	    (long long)(r->d->conf->redis_block * 1000), r->stream) == 0)
		r->reading = 1;
}

/* "host:port", "[v6]:port" or an absolute socket path (addr.h). */
static int
redis_in_address(struct redis_in *r, const char *a, char **cause)
{
	struct addr ad;

	if (addr_parse(a, ADDR_PATH_OK, &ad, cause) != 0)
		return -1;
	if (ad.is_path)
		r->unix_path = xstrdup(ad.path);
	else {
		r->host = xstrdup(ad.host);
		r->port = ad.port;
	}
	return 0;
}

/* The consumer name with %h as the host name and %% as %. */
static char *
redis_in_consumer(const char *tmpl)
{
	char host[HOST_NAME_MAX + 1], *out, *o;
	const char *p;
	size_t size;

	if (gethostname(host, sizeof host) != 0)
		strcpy(host, "localhost");
	host[sizeof host - 1] = '\0';
	size = strlen(tmpl) * (strlen(host) + 1) + 1;
	out = o = xmalloc(size);
	for (p = tmpl; *p != '\0'; p++) {
		if (p[0] == '%' && p[1] == 'h') {
			strcpy(o, host);
			o += strlen(host);
			p++;
		} else if (p[0] == '%' && p[1] == '%') {
			*o++ = '%';
			p++;
		} else
			*o++ = *p;
	}
	*o = '\0';
	return out;
}

struct redis_in *
redis_in_new(struct daemon *d, const char *last_id, char **cause)
{
	const struct conf *conf = d->conf;
	struct redis_in *r;
	struct timeval second = { 1, 0 };

	r = xcalloc(1, sizeof *r);
	r->d = d;
	r->state = RS_IDLE;
	r->lag = -1;
	r->pending = -1;
	r->pending_own = -1;
	r->mark_fd = -1;
	r->backoff = REDIS_IN_BACKOFF_MIN;
	r->address = xstrdup(conf->redis_address);
	r->stream = xstrdup(conf->redis_stream);
	r->group = xstrdup(conf->redis_group);
	r->consumer = redis_in_consumer(conf->redis_consumer);
	r->dead = xstrdup(conf->redis_dead_letter);
	r->start_beginning = conf->redis_start == REDIS_START_BEGINNING;
	if (redis_in_address(r, conf->redis_address, cause) != 0) {
		redis_in_free(r);
		return NULL;
	}
	if (last_id != NULL && *last_id != '\0' &&
	    redis_in_sid_parse(last_id, strlen(last_id), &r->last) != 0) {
		xasprintf(cause, "bad Redis entry ID in the checkpoint: %s",
		    last_id);
		redis_in_free(r);
		return NULL;
	}
	/* The restored state covers everything up to its last ID. */
	r->covered = r->last;
	r->ha = conf->redis_ha;
	if ((r->lease = redis_lease_new(r, cause)) == NULL) {
		redis_in_free(r);
		return NULL;
	}
	redis_in_guard_open(r);
	r->retry_ev = evtimer_new(d->base, redis_in_retry_cb, r);
	r->fail_ev = event_new(d->base, -1, 0, redis_in_fail_cb, r);
	r->watchdog_ev = event_new(d->base, -1, EV_PERSIST,
	    redis_in_watchdog_cb, r);
	if (r->retry_ev == NULL || r->fail_ev == NULL ||
	    r->watchdog_ev == NULL || event_add(r->watchdog_ev, &second)) {
		*cause = xstrdup("cannot create Redis events");
		redis_in_free(r);
		return NULL;
	}
	log_info("redis: consuming stream=%s group=%s consumer=%s "
	    "address=%s after=%s", r->stream, r->group, r->consumer,
	    r->address, redis_in_last_id(r));
	redis_in_connect(r);
	return r;
}

void
redis_in_stop(struct redis_in *r)
{
	if (r == NULL || r->state == RS_STOPPED)
		return;
	redis_in_set_state(r, RS_STOPPED);
	if (r->retry_ev != NULL)
		evtimer_del(r->retry_ev);
	if (r->ac != NULL) {
		redisAsyncFree(r->ac);
		r->ac = NULL;
	}
}

void
redis_in_free(struct redis_in *r)
{
	if (r == NULL)
		return;
	redis_in_stop(r);
	redis_lease_free(r->lease);
	if (r->retry_ev != NULL)
		event_free(r->retry_ev);
	if (r->fail_ev != NULL)
		event_free(r->fail_ev);
	if (r->watchdog_ev != NULL)
		event_free(r->watchdog_ev);
	free(r->address);
	free(r->host);
	free(r->unix_path);
	free(r->stream);
	free(r->group);
	free(r->consumer);
	free(r->dead);
	redis_in_guard_close(r);
	free(r);
}

/* "" before the first entry. */
const char *
redis_in_last_id(struct redis_in *r)
{
	if (r->last.ms == 0 && r->last.seq == 0)
		r->last_str[0] = '\0';
	else
		redis_in_sid_fmt(r->last, r->last_str);
	return r->last_str;
}

void
redis_in_resume(struct redis_in *r)
{
	if (r->state == RS_STOPPED || r->ac != NULL)
		return;
	evtimer_del(r->retry_ev);
	r->backoff = REDIS_IN_BACKOFF_MIN;
	redis_in_connect(r);
}

/* Stop reading: the connection goes (just after, never inside one of
 * its callbacks); delivered entries stay pending for the next reader. */
void
redis_in_suspend(struct redis_in *r, const char *why)
{
	if (r->state == RS_STOPPED)
		return;
	if (r->ac == NULL) {
		evtimer_del(r->retry_ev);
		redis_in_set_state(r, RS_STANDBY);
		return;
	}
	r->fail_why = why;
	event_active(r->fail_ev, EV_TIMEOUT, 0);
}

void
redis_in_position(struct redis_in *r, const char *last_id)
{
	struct sid id = { 0, 0 };

	if (last_id != NULL && *last_id != '\0' &&
	    redis_in_sid_parse(last_id, strlen(last_id), &id) != 0)
		id.ms = id.seq = 0;
	r->last = r->covered = id;
	r->covered_gen++;
}

struct redis_lease *
redis_in_lease(struct redis_in *r)
{
	return r != NULL ? r->lease : NULL;
}

void
redis_in_covered(struct redis_in *r, const char *last_id)
{
	struct sid id;

	if (r == NULL || *last_id == '\0' ||
	    redis_in_sid_parse(last_id, strlen(last_id), &id) != 0 ||
	    redis_in_sid_cmp(id, r->covered) <= 0)
		return;
	r->covered = id;
	r->covered_gen++;
	r->ack_due = 1;
	redis_in_next(r);
}

int64_t
redis_in_lag(struct redis_in *r)
{
	return r->lag;
}

void
redis_in_metrics(struct redis_in *r, struct evbuffer *b)
{
	int i;

	metrics_gauge(b, "stopcock_redis_up", "1 when the stream consumer "
	    "is connected and reading.", r->state == RS_PENDING ||
	    r->state == RS_STEADY);
	/* -1 marks a figure Redis has not told us yet: NaN */
	metrics_gauge(b, "stopcock_redis_lag", "Stream entries not yet "
	    "delivered to the group (NaN when unknown).",
	    r->lag < 0 ? NAN : (double)r->lag);
	metrics_gauge(b, "stopcock_redis_pending", "Entries delivered to "
	    "the group but not acknowledged.",
	    r->pending < 0 ? NAN : (double)r->pending);
	metrics_gauge(b, "stopcock_redis_pending_own", "Entries pending on "
	    "this consumer.", r->pending_own < 0 ? NAN :
	    (double)r->pending_own);
	metrics_counter(b, "stopcock_redis_entries_total", "Stream entries "
	    "applied.", r->entries);
	metrics_counter(b, "stopcock_redis_skipped_total", "Entries read "
	    "back that the checkpoint already covered.", r->skipped);
	metrics_counter(b, "stopcock_redis_claimed_total", "Entries "
	    "reclaimed from other, idle consumers.", r->claimed);
	metrics_counter(b, "stopcock_redis_acked_total", "Entries "
	    "acknowledged.", r->acked);
	metrics_counter(b, "stopcock_redis_reconnects_total", "Connection "
	    "attempts after the first.", r->reconnects);
	metrics_counter(b, "stopcock_redis_errors_total", "Commands that "
	    "failed.", r->errors);
	evbuffer_add_printf(b, "# HELP stopcock_redis_dead_letter_total "
	    "Entries moved to the dead-letter stream.\n# TYPE "
	    "stopcock_redis_dead_letter_total counter\n");
	for (i = 0; i < DEAD_N; i++)
		evbuffer_add_printf(b, "stopcock_redis_dead_letter_total{"
		    "reason=\"%s\"} %" PRIu64 "\n", redis_in_dead_names[i],
		    r->dead_count[i]);
	metrics_family(b, "stopcock_redis_trimmed_total", "counter",
	    "Entries trimmed from the stream before they were applied: "
	    "pending on us above the checkpoint, or never delivered.");
	for (i = 0; i < TRIM_N; i++)
		evbuffer_add_printf(b, "stopcock_redis_trimmed_total{"
		    "when=\"%s\"} %" PRIu64 "\n", redis_in_trim_names[i],
		    r->trimmed[i]);
	metrics_counter(b, "stopcock_redis_dead_letter_failed_total",
	    "Dead-letter moves that Redis refused.", r->dead_failed);
	metrics_family(b, "stopcock_redis_group_made_total", "counter",
	    "Consumer groups made: new at the stream's end or beginning, or "
	    "lost and made again after the checkpoint or at the stream's "
	    "start.");
	for (i = 0; i < MADE_N; i++)
		evbuffer_add_printf(b, "stopcock_redis_group_made_total{"
		    "from=\"%s\"} %" PRIu64 "\n", redis_in_made_names[i],
		    r->made[i]);
	metrics_counter(b, "stopcock_redis_start_skipped_total", "Entries "
	    "already in the stream that a new group at its end skipped.",
	    r->start_skipped);
	redis_lease_metrics(r->lease, b);
}

json_t *
redis_in_json(struct redis_in *r)
{
	json_t *o = json_object(), *dead = json_object(), *trimmed, *made;
	char buf[SID_BUF];
	int i;

	json_object_set_new(o, "state", json_string(
	    redis_in_state_name(r->state)));
	json_object_set_new(o, "address", json_string(r->address));
	json_object_set_new(o, "stream", json_string(r->stream));
	json_object_set_new(o, "group", json_string(r->group));
	json_object_set_new(o, "consumer", json_string(r->consumer));
	json_object_set_new(o, "dead_letter_stream", json_string(r->dead));
	json_object_set_new(o, "last_applied",
	    json_string(redis_in_last_id(r)));
	json_object_set_new(o, "covered", json_string(
	    r->covered.ms == 0 && r->covered.seq == 0 ? "" :
	    redis_in_sid_fmt(r->covered, buf)));
	json_object_set_new(o, "lag", r->lag < 0 ? json_null() :
	    json_integer(r->lag));
	json_object_set_new(o, "lag_capped", json_boolean(r->lag_capped));
	json_object_set_new(o, "pending", r->pending < 0 ? json_null() :
	    json_integer(r->pending));
	json_object_set_new(o, "pending_own", r->pending_own < 0 ?
	    json_null() : json_integer(r->pending_own));
	json_object_set_new(o, "entries", json_integer((json_int_t)r->entries));
	json_object_set_new(o, "skipped", json_integer((json_int_t)r->skipped));
	json_object_set_new(o, "deleted", json_integer((json_int_t)r->deleted));
	trimmed = json_object();
	for (i = 0; i < TRIM_N; i++)
		json_object_set_new(trimmed, redis_in_trim_names[i],
		    json_integer((json_int_t)r->trimmed[i]));
	json_object_set_new(o, "trimmed", trimmed);
	json_object_set_new(o, "claimed", json_integer((json_int_t)r->claimed));
	json_object_set_new(o, "acked", json_integer((json_int_t)r->acked));
	json_object_set_new(o, "reconnects",
	    json_integer((json_int_t)r->reconnects));
	json_object_set_new(o, "errors", json_integer((json_int_t)r->errors));
	for (i = 0; i < DEAD_N; i++)
		json_object_set_new(dead, redis_in_dead_names[i],
		    json_integer((json_int_t)r->dead_count[i]));
	json_object_set_new(o, "dead_lettered", dead);
	json_object_set_new(o, "dead_letter_failed",
	    json_integer((json_int_t)r->dead_failed));
	made = json_object();
	for (i = 0; i < MADE_N; i++)
		json_object_set_new(made, redis_in_made_names[i],
		    json_integer((json_int_t)r->made[i]));
	json_object_set_new(o, "group_made", made);
	json_object_set_new(o, "group_made_at", json_string(r->made_at));
	json_object_set_new(o, "start_skipped",
	    json_integer((json_int_t)r->start_skipped));
	json_object_set_new(o, "role", json_string(redis_lease_role(r->lease)));
	json_object_set_new(o, "lease", redis_lease_json(r->lease));
	return o;
}
