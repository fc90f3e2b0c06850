/*
 * redis_lease.c: one daemon consumes a stream's group at a time, chosen
 * by a lease held in Redis itself. It is the single-instance lock of the
 * Redis documentation ("Distributed Locks with Redis", the correct
 * implementation with a single instance): the key is set to a random
 * token with an expiry only if it does not exist (SET NX PX), and only
 * the holder of that token may extend it or write under it, checked by
 * a Lua script that compares the token and acts in one atomic step.
 *
 * Every daemon runs a lease of its own on a connection of its own (the
 * consumer's connection spends its time in blocking reads): every
 * quarter of lease_ttl it sends one script that takes the lease if it
 * is free, extends it if the token is ours, or says another daemon holds
 * it. The holder counts its lease valid only until three quarters of
 * lease_ttl after the last renewal Redis confirmed, measured from when
 * that renewal was sent (Redis started the expiry later than that), so
 * a holder that was stopped (SIGSTOP, a long pause, a lost link) stops
 * consuming before the lease can have expired in Redis, whatever it
 * finds on waking: redis_in.c asks redis_lease_valid before it sends a
 * read and before it applies what a read brought.
 *
 * With [redis] ha = yes the lease also fences the state. The checkpoint
 * image (the same bytes as the file, header and JSON) is written to
 * state_key by a script that first compares the lease token, so a stale
 * holder can never overwrite a newer holder's checkpoint; reads are
 * fenced the same way (redis_in.c), and all daemons read as one shared
 * consumer name. A daemon that takes the lease, or finds it still its
 * own after another could have held it, first reads state_key and
 * adopts it (ckpt_adopt), then the consumer reads the shared consumer's
 * pending entries back from the start: those at or below the adopted
 * checkpoint's last entry are in the state already, the later ones are
 * applied in ID order, then new entries. Nothing is acknowledged before
 * a checkpoint in state_key covers it, so every entry is in the adopted
 * state or still pending: each is counted exactly once.
 *
 * Without ha the lease is a guard: a second daemon configured on the
 * same group finds it held, refuses to consume, says so in the log
 * (again every minute) and in /api/health and /metrics, and polls; it
 * takes the group only once the first daemon stopped renewing. The
 * token is kept in the state directory (redis-lease), so a daemon that
 * restarts finds its own lease and goes on at once.
 */
#include <sys/random.h>
#include <sys/time.h>

#include <errno.h>
#include <fcntl.h>
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <event2/event.h>
#include <hiredis/hiredis.h>
#include <hiredis/async.h>
#include <hiredis/adapters/libevent.h>

#include "stopcock/log.h"
#include "redis_in_int.h"

#define LEASE_TOKEN_BYTES 16
#define LEASE_TOKEN_LEN (2 * LEASE_TOKEN_BYTES)
#define LEASE_TOKEN_FILE "redis-lease"
#define LEASE_VALID_PART 0.75	/* of the TTL, from a confirmed renewal */
#define LEASE_STEP_PART 0.25	/* renew (or poll) every quarter */
#define LEASE_VALUE_MAX ((size_t)512 << 20)	/* Redis's largest string */
#define LEASE_CONNECT_TIMEOUT 5	/* seconds, the synchronous writer's */
#define LEASE_STORE_TIMEOUT 60	/* seconds for one checkpoint write */
#define LEASE_REFUSED_EVERY 60.0	/* seconds between refusal logs */

/* Take the lease if free (2), extend it if ours (1), else 0. */
static const char lease_acquire_lua[] =
    "if redis.call('SET', KEYS[1], ARGV[1], 'NX', 'PX', ARGV[2]) then "
    "return 2 end "
    "if redis.call('GET', KEYS[1]) == ARGV[1] then "
    "redis.call('PEXPIRE', KEYS[1], ARGV[2]) return 1 end "
    "return 0";

/* The checkpoint, stored only under our token (1), else refused (0);
 * ARGV[3] "1" also gives the lease up (a clean shutdown). */
static const char lease_store_lua[] =
    "if redis.call('GET', KEYS[1]) ~= ARGV[1] then return 0 end "
    "redis.call('SET', KEYS[2], ARGV[2]) "
    "if ARGV[3] == '1' then redis.call('DEL', KEYS[1]) end "
    "return 1";

/*
 * A read of the group under our token: {0} when the token is not ours,
 * {1, reply} with XREADGROUP's reply, or, when nothing new is there,
 * {2, id} with the newest entry's ID, after which a plain XREAD BLOCK
 * (which delivers nothing to the group) waits for more.
 */
const char redis_lease_read_lua[] =
    "if redis.call('GET', KEYS[1]) ~= ARGV[1] then return {0} end "
    "local r = redis.pcall('XREADGROUP', 'GROUP', ARGV[2], ARGV[3], "
    "'COUNT', ARGV[4], 'STREAMS', KEYS[2], ARGV[5]) "
    "if type(r) == 'table' and r.err then return r end "
    "if r then return {1, r} end "
    "local t = redis.call('XREVRANGE', KEYS[2], '+', '-', 'COUNT', 1) "
    "if t[1] then return {2, t[1][1]} end "
    "return {2, '0-0'}";

enum lease_role {
	LR_UNKNOWN,	/* not told yet, or ours lapsed: not consuming */
	LR_STANDBY,	/* another daemon holds it */
	LR_RESTORING,	/* ours; reading the holder's checkpoint */
	LR_ACTIVE	/* ours, confirmed: consuming */
};

struct redis_lease {
	struct redis_in		*r;
	struct daemon		*d;
	enum lease_role		 role;
	int			 ha;
	char			*key;
	char			*state_key;
	double			 ttl;		/* seconds */
	char			 token[LEASE_TOKEN_LEN + 1];

	redisAsyncContext	*ac;
	struct event		*tick_ev;
	int			 busy;		/* a lease script is out */
	double			 sent;		/* when it was sent */
	int			 fetching;	/* GET state_key out */
	double			 confirmed;	/* send time, last renewal */
	int			 current;	/* our state is the latest */
	int			 seen_other;	/* another held it since */
	double			 refused_logged;

	uint64_t		 takeovers;
	uint64_t		 acquired;
	uint64_t		 lapses;
	uint64_t		 fenced;
	uint64_t		 refusals;
	uint64_t		 restores;
	uint64_t		 errors;
};

static const char *
redis_lease_role_name(const struct redis_lease *l, enum lease_role role)
{
	switch (role) {
	case LR_UNKNOWN:
		return "unknown";
	case LR_STANDBY:
		return l->ha ? "standby" : "refused";
	case LR_RESTORING:
		return "restoring";
	case LR_ACTIVE:
		return "active";
	}
	return "?";
}

/* The one place the role changes. */
static void
redis_lease_set_role(struct redis_lease *l, enum lease_role new)
{
	if (l->role == new)
		return;
	log_info("redis lease: %s -> %s key=%s", redis_lease_role_name(l,
	    l->role), redis_lease_role_name(l, new), l->key);
	l->role = new;
}

int
redis_lease_valid(const struct redis_lease *l)
{
	return l->role == LR_ACTIVE &&
	    daemon_now() - l->confirmed < l->ttl * LEASE_VALID_PART;
}

int
redis_lease_ha(const struct redis_lease *l)
{
	return l != NULL && l->ha;
}

int
redis_lease_may_checkpoint(const struct redis_lease *l)
{
	return l == NULL || !l->ha || redis_lease_valid(l);
}

const char *
redis_lease_key(const struct redis_lease *l)
{
	return l->key;
}

const char *
redis_lease_token(const struct redis_lease *l)
{
	return l->token;
}

void
redis_lease_fenced(struct redis_lease *l)
{
	if (l != NULL)
		l->fenced++;
}

/* Ours no longer (or not for sure): stop consuming now. */
static void
redis_lease_stop_consuming(struct redis_lease *l, enum lease_role role,
    const char *why)
{
	int was = l->role == LR_ACTIVE || l->role == LR_RESTORING;

	redis_lease_set_role(l, role);
	if (was)
		redis_in_suspend(l->r, why);
}

static void
redis_lease_become_active(struct redis_lease *l)
{
	l->current = 1;
	if (l->seen_other) {
		l->takeovers++;
		l->seen_other = 0;
		if (l->ha)
			log_warnx("redis lease: taken over from another "
			    "daemon (its lease expired) key=%s", l->key);
		else
			log_warnx("redis lease: the other daemon's lease "
			    "expired: consuming the group now, with this "
			    "daemon's own state (the other's tallies are not "
			    "here; use ha = yes to share them) key=%s", l->key);
	}
	redis_lease_set_role(l, LR_ACTIVE);
	redis_in_resume(l->r);
}

/* GET state_key answered: adopt the holder's checkpoint, then consume. */
static void
redis_lease_state_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_lease *l = ac->data;
	redisReply *rep = reply;
	char *cause = NULL;

	l->fetching = 0;
	if (rep == NULL || l->role != LR_RESTORING)
		return;
	if (daemon_now() - l->confirmed >= l->ttl * LEASE_VALID_PART) {
		redis_lease_set_role(l, LR_UNKNOWN);
		return;
	}
	if (rep->type == REDIS_REPLY_NIL) {
		log_warnx("redis lease: no checkpoint in Redis yet: going on "
		    "from this daemon's own state state_key=%s", l->state_key);
		redis_lease_become_active(l);
		return;
	}
	if (rep->type != REDIS_REPLY_STRING) {
		l->errors++;
		log_warnx("redis lease: GET %s failed: %.*s", l->state_key,
		    rep->str != NULL ? (int)rep->len : 0,
		    rep->str != NULL ? rep->str : "");
		redis_lease_set_role(l, LR_UNKNOWN);
		return;
	}
	if (ckpt_adopt(l->d, rep->str, rep->len, &cause) != 0) {
		/* Never consume on top of state we could not take: the
		 * next round tries again, and says so again. */
		l->errors++;
		log_crit("redis lease: the checkpoint in Redis was refused, "
		    "not consuming: %s state_key=%s", cause, l->state_key);
		free(cause);
		redis_lease_set_role(l, LR_UNKNOWN);
		return;
	}
	l->restores++;
	redis_in_position(l->r, l->d->restored_redis_id);
	log_info("redis lease: checkpoint taken from Redis state_key=%s "
	    "bytes=%zu last=%s", l->state_key, rep->len,
	    l->d->restored_redis_id);
	redis_lease_become_active(l);
}

static void
redis_lease_acquire_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_lease *l = ac->data;
	redisReply *rep = reply;
	double now = daemon_now();

	l->busy = 0;
	if (rep == NULL)
		return;
	if (rep->type != REDIS_REPLY_INTEGER) {
		l->errors++;
		log_warnx("redis lease: the lease script failed: %.*s key=%s",
		    rep->str != NULL ? (int)rep->len : 0,
		    rep->str != NULL ? rep->str : "", l->key);
		return;
	}
	if (rep->integer == 0) {
		/* Another daemon holds it. */
		l->current = 0;
		l->seen_other = 1;
		if (l->role != LR_STANDBY) {
			if (l->role == LR_ACTIVE || l->role == LR_RESTORING)
				log_warnx("redis lease: another daemon holds "
				    "the lease: stopped consuming key=%s",
				    l->key);
			if (!l->ha)
				l->refusals++;
			redis_lease_stop_consuming(l, LR_STANDBY,
			    "another daemon holds the lease");
		}
		if (!l->ha && now - l->refused_logged >= LEASE_REFUSED_EVERY) {
			l->refused_logged = now;
			log_crit("redis: another daemon consumes group %s of "
			    "stream %s (it holds %s): refusing to consume, "
			    "or the two would split the entries between them "
			    "and each test half the data; set ha = yes on "
			    "every daemon for a standby", l->r->group,
			    l->r->stream, l->key);
		}
		return;
	}
	l->confirmed = l->sent;
	if (rep->integer == 2) {
		/* It was free: someone else may have held it meanwhile. */
		l->acquired++;
		l->current = 0;
	}
	if (l->role == LR_ACTIVE || l->role == LR_RESTORING)
		return;
	if (l->ha && !l->current) {
		redis_lease_set_role(l, LR_RESTORING);
		if (redisAsyncCommand(l->ac, redis_lease_state_cb, NULL,
		    "GET %s", l->state_key) == REDIS_OK)
			l->fetching = 1;
		else
			redis_lease_set_role(l, LR_UNKNOWN);
		return;
	}
	redis_lease_become_active(l);
}

static void
redis_lease_send(struct redis_lease *l)
{
	char ms[32];

	snprintf(ms, sizeof ms, "%lld", (long long)(l->ttl * 1000));
	l->sent = daemon_now();
	if (redisAsyncCommand(l->ac, redis_lease_acquire_cb, NULL,
	    "EVAL %s 1 %s %s %s", lease_acquire_lua, l->key, l->token, ms) ==
	    REDIS_OK)
		l->busy = 1;
}

static void
redis_lease_connect_cb(const redisAsyncContext *cac, int status)
{
	struct redis_lease *l = cac->data;

	if (status != REDIS_OK) {
		/* hiredis frees the context after this callback. */
		log_warnx("redis lease: cannot connect: %s", cac->errstr);
		l->ac = NULL;
		l->busy = l->fetching = 0;
		return;
	}
	redis_lease_send(l);
}

static void
redis_lease_disconnect_cb(const redisAsyncContext *cac, int status)
{
	struct redis_lease *l = cac->data;

	l->ac = NULL;
	l->busy = l->fetching = 0;
	if (status != REDIS_OK)
		log_warnx("redis lease: connection lost: %s", cac->errstr);
}

static void
redis_lease_connect(struct redis_lease *l)
{
	struct redis_in *r = l->r;
	redisAsyncContext *ac;

	if (r->unix_path != NULL)
		ac = redisAsyncConnectUnix(r->unix_path);
	else
		ac = redisAsyncConnect(r->host, r->port);
	if (ac == NULL || ac->err) {
		log_warnx("redis lease: cannot connect: %s",
		    ac != NULL ? ac->errstr : "out of memory");
		if (ac != NULL)
			redisAsyncFree(ac);
		return;
	}
	ac->data = l;
	if (redisLibeventAttach(ac, l->d->base) != REDIS_OK) {
		redisAsyncFree(ac);
		return;
	}
	redisAsyncSetConnectCallback(ac, redis_lease_connect_cb);
	redisAsyncSetDisconnectCallback(ac, redis_lease_disconnect_cb);
	l->ac = ac;
	l->sent = daemon_now();
	l->busy = 1;	/* the connect counts as the first command */
}

/* Every quarter TTL: lapse when unconfirmed, then renew (or poll). */
static void
redis_lease_tick_cb(evutil_socket_t fd, short what, void *arg)
{
	struct redis_lease *l = arg;
	double now = daemon_now();

	/* Shutting down: the last checkpoint gave the lease up; taking it
	 * again now would only make a standby wait for it to expire. */
	if (l->d->draining)
		return;
	if ((l->role == LR_ACTIVE || l->role == LR_RESTORING) &&
	    now - l->confirmed >= l->ttl * LEASE_VALID_PART) {
		l->lapses++;
		log_warnx("redis lease: no renewal confirmed for %.1fs: "
		    "stopped consuming (the lease may be another's by now) "
		    "key=%s", now - l->confirmed, l->key);
		redis_lease_stop_consuming(l, LR_UNKNOWN, "lease lapsed");
	}
	if (l->ac == NULL) {
		redis_lease_connect(l);
		return;
	}
	if (l->busy || l->fetching) {
		if (now - l->sent > l->ttl) {
			log_warnx("redis lease: no answer in %.1fs: "
			    "reconnecting", now - l->sent);
			redisAsyncFree(l->ac);	/* not inside its callback */
			l->ac = NULL;
			l->busy = l->fetching = 0;
		}
		return;
	}
	redis_lease_send(l);
}

/* The token kept in the state directory, or a new random one. */
static int
redis_lease_token_load(struct redis_lease *l, char **cause)
{
	static const char hex[] = "0123456789abcdef";
	unsigned char raw[LEASE_TOKEN_BYTES];
	const char *parts[1];
	size_t lens[1], i;
	char *path, buf[LEASE_TOKEN_LEN + 2];
	ssize_t n;
	int fd, rc = -1;

	xasprintf(&path, "%s/%s", l->d->state_dir, LEASE_TOKEN_FILE);
	if ((fd = open(path, O_RDONLY | O_CLOEXEC)) != -1) {
		n = read(fd, buf, sizeof buf);
		close(fd);
		if (n == LEASE_TOKEN_LEN + 1 && buf[LEASE_TOKEN_LEN] == '\n' &&
		    strspn(buf, hex) == LEASE_TOKEN_LEN) {
			memcpy(l->token, buf, LEASE_TOKEN_LEN);
			l->token[LEASE_TOKEN_LEN] = '\0';
			free(path);
			return 0;
		}
		log_warnx("redis lease: %s is not a token: making a new one",
		    path);
	}
	for (i = 0; i < sizeof raw; i += (size_t)n)
		if ((n = getrandom(raw + i, sizeof raw - i, 0)) <= 0) {
			if (n == -1 && errno == EINTR) {
				n = 0;
				continue;
			}
			xasprintf(cause, "getrandom: %s", strerror(errno));
			goto out;
		}
	for (i = 0; i < sizeof raw; i++) {
		l->token[2 * i] = hex[raw[i] >> 4];
		l->token[2 * i + 1] = hex[raw[i] & 15];
	}
	l->token[LEASE_TOKEN_LEN] = '\0';
	snprintf(buf, sizeof buf, "%s\n", l->token);
	parts[0] = buf;
	lens[0] = LEASE_TOKEN_LEN + 1;
	if (durable_write(l->d->state_dir, path, parts, lens, 1, 0600,
	    cause) != 0)
		goto out;
	rc = 0;
out:
	free(path);
	return rc;
}

struct redis_lease *
redis_lease_new(struct redis_in *r, char **cause)
{
	const struct conf *conf = r->d->conf;
	struct redis_lease *l;
	struct timeval tv;
	double step;

	l = xcalloc(1, sizeof *l);
	l->r = r;
	l->d = r->d;
	l->role = LR_UNKNOWN;
	l->ha = conf->redis_ha;
	l->ttl = conf->redis_lease_ttl;
	if (conf->redis_lease_key != NULL)
		l->key = xstrdup(conf->redis_lease_key);
	else
		xasprintf(&l->key, "%s:%s:lease", r->stream, r->group);
	if (conf->redis_state_key != NULL)
		l->state_key = xstrdup(conf->redis_state_key);
	else
		xasprintf(&l->state_key, "%s:%s:state", r->stream, r->group);
	if (redis_lease_token_load(l, cause) != 0) {
		redis_lease_free(l);
		return NULL;
	}
	step = l->ttl * LEASE_STEP_PART;
	tv.tv_sec = (time_t)step;
	tv.tv_usec = (suseconds_t)((step - (double)tv.tv_sec) * 1e6);
	l->tick_ev = event_new(l->d->base, -1, EV_PERSIST, redis_lease_tick_cb,
	    l);
	if (l->tick_ev == NULL || event_add(l->tick_ev, &tv) != 0) {
		*cause = xstrdup("cannot create the lease timer");
		redis_lease_free(l);
		return NULL;
	}
	log_info("redis lease: %s key=%s ttl=%.1fs%s%s", l->ha ?
	    "high availability" : "guard against a second consumer", l->key,
	    l->ttl, l->ha ? " state_key=" : "", l->ha ? l->state_key : "");
	redis_lease_connect(l);
	return l;
}

void
redis_lease_free(struct redis_lease *l)
{
	if (l == NULL)
		return;
	if (l->tick_ev != NULL)
		event_free(l->tick_ev);
	if (l->ac != NULL)
		redisAsyncFree(l->ac);
	free(l->key);
	free(l->state_key);
	free(l);
}

/* The consumer's fenced read found another token: ours is gone. */
void
redis_lease_lost(struct redis_lease *l)
{
	l->current = 0;
	l->seen_other = 1;
	log_warnx("redis lease: a fenced read found the lease not ours: "
	    "stopped consuming key=%s", l->key);
	redis_lease_stop_consuming(l, LR_UNKNOWN, "lease not ours");
}

/* XREAD BLOCK answered: something new, or the block ran out. */
static void
redis_lease_wait_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;

	r->reading = 0;
	if (redis_in_answer(r, rep) != 0)
		return;
	if (rep->type == REDIS_REPLY_ERROR) {
		redis_in_fail(r, "XREAD (waiting)", rep);
		return;
	}
	redis_in_next(r);
}

static void
redis_lease_read_cb(redisAsyncContext *ac, void *reply, void *priv)
{
	struct redis_in *r = ac->data;
	redisReply *rep = reply;
	int pel = priv != NULL;
	const redisReply *v;

	r->reading = 0;
	if (redis_in_answer(r, rep) != 0)
		return;
	if (rep->type == REDIS_REPLY_ERROR) {
		redis_in_read_reply(r, rep, pel);	/* NOGROUP and all */
		return;
	}
	if (rep->type != REDIS_REPLY_ARRAY || rep->elements < 1 ||
	    rep->element[0]->type != REDIS_REPLY_INTEGER) {
		redis_in_fail(r, "the fenced read (unexpected answer)", NULL);
		return;
	}
	v = rep->elements > 1 ? rep->element[1] : NULL;
	switch (rep->element[0]->integer) {
	case 0:
		redis_lease_lost(r->lease);
		redis_in_suspend(r, "lease not ours");
		return;
	case 1:
		if (v != NULL) {
			redis_in_read_reply(r, v, pel);
			return;
		}
		break;
	case 2:
		/* Nothing new up to the newest entry v: wait past it. */
		if (v != NULL && v->type == REDIS_REPLY_STRING && !pel) {
			if (redis_in_cmd(r, redis_lease_wait_cb, NULL,
			    "XREAD COUNT 1 BLOCK %lld STREAMS %s %s",
			    (long long)(r->d->conf->redis_block * 1000),
			    r->stream, v->str) == 0)
				r->reading = 1;
			return;
		}
		break;
	}
	redis_in_fail(r, "the fenced read (unexpected answer)", NULL);
}

void
redis_lease_read(struct redis_lease *l, int pel)
{
	struct redis_in *r = l->r;
	char count[32], cur[SID_BUF];

	snprintf(count, sizeof count, "%lld",
	    (long long)r->d->conf->redis_batch);
	if (pel)
		redis_in_sid_fmt(r->pel_cursor, cur);
	else
		strcpy(cur, ">");
	if (redis_in_cmd(r, redis_lease_read_cb, pel ? (void *)l : NULL,
	    "EVAL %s 2 %s %s %s %s %s %s %s", redis_lease_read_lua, l->key,
	    r->stream, l->token, r->group, r->consumer, count, cur) == 0 &&
	    !pel)
		r->reading = 1;
}

/*
 * Store a checkpoint image under the lease, synchronously on a
 * connection of its own (the writer child's, or shutdown's). 0 stored,
 * 1 refused (not our lease), -1 failed with a cause.
 */
int
redis_lease_store(struct redis_lease *l, const char *const *parts,
    const size_t *lens, int nparts, int release, char **cause)
{
	struct redis_in *r = l->r;
	struct timeval ctv = { LEASE_CONNECT_TIMEOUT, 0 };
	struct timeval stv = { LEASE_STORE_TIMEOUT, 0 };
	redisContext *c;
	redisReply *rep;
	const char *argv[8];
	size_t alen[8], total = 0, off = 0;
	char *image;
	int i, rc = -1;

	for (i = 0; i < nparts; i++)
		total += lens[i];
	if (total > LEASE_VALUE_MAX) {
		xasprintf(cause, "the checkpoint (%zu bytes) is larger than "
		    "the largest Redis value (512 MB)", total);
		return -1;
	}
	if (r->unix_path != NULL)
		c = redisConnectUnixWithTimeout(r->unix_path, ctv);
	else
		c = redisConnectWithTimeout(r->host, r->port, ctv);
	if (c == NULL || c->err) {
		xasprintf(cause, "redis %s: %s", r->address,
		    c != NULL ? c->errstr : "out of memory");
		redisFree(c);
		return -1;
	}
	redisSetTimeout(c, stv);
	image = xmalloc(total + 1);
	for (i = 0; i < nparts; i++) {
		memcpy(image + off, parts[i], lens[i]);
		off += lens[i];
	}
	/* EVAL script 2 lease state token image release */
	argv[0] = "EVAL";
	argv[1] = lease_store_lua;
	argv[2] = "2";
	argv[3] = l->key;
	argv[4] = l->state_key;
	argv[5] = l->token;
	argv[7] = release ? "1" : "0";
	for (i = 0; i < 8; i++)
		alen[i] = i == 6 ? 0 : strlen(argv[i]);
	argv[6] = image;
	alen[6] = total;
	rep = redisCommandArgv(c, 8, argv, alen);
	free(image);
	if (rep == NULL)
		xasprintf(cause, "redis %s: %s", r->address, c->errstr);
	else if (rep->type == REDIS_REPLY_INTEGER)
		rc = rep->integer == 1 ? 0 : 1;
	else
		xasprintf(cause, "storing %s: %.*s", l->state_key,
		    rep->str != NULL ? (int)rep->len : 0,
		    rep->str != NULL ? rep->str : "unexpected answer");
	freeReplyObject(rep);
	redisFree(c);
	return rc;
}

void
redis_lease_metrics(struct redis_lease *l, struct evbuffer *b)
{
	metrics_gauge(b, "stopcock_redis_active", "1 when this daemon holds "
	    "the group's lease and consumes; 0 on a standby (or one refused "
	    "because another daemon consumes).", redis_lease_valid(l));
	metrics_counter(b, "stopcock_redis_takeovers_total", "Leases taken "
	    "after another daemon held them.", l->takeovers);
	metrics_counter(b, "stopcock_redis_lease_lapses_total", "Times this "
	    "daemon stopped consuming because no renewal was confirmed in "
	    "time.", l->lapses);
	metrics_counter(b, "stopcock_redis_lease_fenced_total", "Checkpoint "
	    "writes Redis refused because the lease was not ours.", l->fenced);
	metrics_counter(b, "stopcock_redis_lease_refused_total", "Times this "
	    "daemon (without ha) refused to consume because another daemon "
	    "held the group.", l->refusals);
	metrics_counter(b, "stopcock_redis_lease_errors_total", "Lease "
	    "commands that failed, and checkpoints in Redis that could not "
	    "be taken.", l->errors);
}

json_t *
redis_lease_json(struct redis_lease *l)
{
	double now = daemon_now();

	return json_pack("{s:s, s:s, s:s, s:s?, s:f, s:o, s:I, s:I, s:I, s:I, "
	    "s:I, s:I}",
	    "role", redis_lease_role_name(l, l->role),
	    "mode", l->ha ? "ha" : "guard",
	    "key", l->key,
	    "state_key", l->ha ? l->state_key : NULL,
	    "ttl_seconds", l->ttl,
	    "confirmed_age_seconds", l->confirmed > 0 ?
	    json_real(now - l->confirmed) : json_null(),
	    "takeovers", (json_int_t)l->takeovers,
	    "lapses", (json_int_t)l->lapses,
	    "fenced", (json_int_t)l->fenced,
	    "refusals", (json_int_t)l->refusals,
	    "restores", (json_int_t)l->restores,
	    "errors", (json_int_t)l->errors);
}

const char *
redis_lease_role(struct redis_lease *l)
{
	return redis_lease_role_name(l, l->role);
}
