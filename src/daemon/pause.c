/*
 * pause.c: auto-pause. The engine emits FINDING_PAUSE when a guardrail
 * with action = pause establishes harm at the stricter pause_alpha (the
 * finding carries that level); dispatch.c asks pause_decide whether to
 * act on it, then pause_deliver delivers it and alert.c raises the
 * pause alert. The
 * rules, in order: never on evidence that records from untrusted inputs
 * (unsigned, and not trusted by the configuration) went into, never on
 * data that SRM made untrustworthy (unless the
 * pause is for SRM itself and pause_on_srm allows it), at most once per
 * experiment and epoch, at most pause_max_per_hour pauses in any hour,
 * and nothing at all under dry_run. Every decision, pause or refusal, is
 * one JSON line in <state_dir>/pause-audit.log with its evidence; the
 * audit log is also read back at start so a restart keeps the
 * once-per-epoch promise and the hourly limit.
 *
 * A pause is delivered two ways: an HTTP POST to [pause] url, signed and
 * spooled like every webhook (webhook_post to the internal receiver), and
 * a Redis SET of the pause key plus a PUBLISH on the pause channel over
 * this file's own hiredis async connection on the daemon's loop. Redis
 * commands wait in a bounded queue while the connection is down and are
 * re-sent after a reconnect.
 */
#include <sys/queue.h>
#include <sys/stat.h>

#include <errno.h>
#include <fcntl.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <hiredis/hiredis.h>
#include <hiredis/async.h>
#include <hiredis/adapters/libevent.h>

#include "stopcock/addr.h"
#include "stopcock/log.h"
#include "daemon.h"

#define PAUSE_DONE_MAX		4096	/* experiment x epoch remembered */
#define PAUSE_OPS_MAX		1024	/* Redis commands waiting */
#define PAUSE_KEY_MAX		512	/* bytes of an expanded Redis key */
#define PAUSE_AUDIT_TAIL	(256 * 1024)	/* bytes read back at start */
#define PAUSE_BACKOFF_MIN	0.5
#define PAUSE_BACKOFF_MAX	30.0
#define PAUSE_RATE_MAX		10000	/* cap on pause_max_per_hour */
#define PAUSE_ID_BYTES		16	/* of SHA-256, as hex after "sp_" */

/* By enum pause_decision (daemon.h); PAUSE_NONE is never audited. */
static const struct {
	const char	*decision;
	const char	*reason;
} pause_names[PAUSE_NDECISIONS] = {
	{ "none", "not for the pause policy" },
	{ "paused", "harm established at pause_alpha" },
	{ "dry_run", "dry run: would have paused" },
	{ "refused", "untrusted" },
	{ "refused", "already_paused_this_epoch" },
	{ "refused", "rate_limited" },
	{ "refused", "untrusted_input" },
};

/* The pause connection to Redis; changed only by pause_redis_set_state. */
enum pause_redis_state {
	PAUSE_REDIS_OFF,	/* no Redis delivery configured */
	PAUSE_REDIS_DOWN,	/* waiting for the reconnect timer */
	PAUSE_REDIS_CONNECTING,
	PAUSE_REDIS_UP
};

struct pause_op {
	TAILQ_ENTRY(pause_op)	 entry;
	struct pause		*p;
	uint64_t		 seq;
	const char		*verb;		/* "SET" or "PUBLISH" */
	char			*arg;		/* key or channel */
	char			*value;
};
TAILQ_HEAD(pause_ops, pause_op);

struct pause_done {
	char		experiment[PROTO_NAME_MAX + 1];
	uint32_t	epoch;
};

struct pause {
	struct daemon		*d;
	char			*audit_path;
	int			 audit_fd;

	struct pause_done	 done[PAUSE_DONE_MAX];	/* ring */
	size_t			 ndone;
	size_t			 done_next;
	double			*times;		/* ring of recent pause times */
	struct pause_done	*times_of;	/* whose (epoch unused) */
	uint32_t		 rate;		/* pause_max_per_hour, 0 none */
	uint32_t		 ntimes;
	uint32_t		 times_next;

	enum pause_redis_state	 state;
	redisAsyncContext	*rc;
	char			*host;
	int			 port;
	char			*unix_path;
	struct event		*reconnect;
	double			 backoff;
	struct pause_ops	 queue;		/* not yet sent */
	struct pause_ops	 sent;		/* awaiting a reply */
	uint32_t		 nqueue;
	uint64_t		 seq;
	int			 freeing;

	uint64_t		 decisions[PAUSE_NDECISIONS];
	uint64_t		 redis_ok;
	uint64_t		 redis_errors;
	uint64_t		 redis_dropped;
	uint64_t		 http_queued;
	uint64_t		 audit_errors;
};

static void	pause_redis_connect(struct pause *);
static void	pause_redis_flush(struct pause *);

static const char *
pause_redis_state_name(enum pause_redis_state st)
{
	switch (st) {
	case PAUSE_REDIS_OFF:
		return "off";
	case PAUSE_REDIS_DOWN:
		return "down";
	case PAUSE_REDIS_CONNECTING:
		return "connecting";
	case PAUSE_REDIS_UP:
		return "up";
	}
	return "?";
}

/* Every change of the connection state goes through here, logged. */
static void
pause_redis_set_state(struct pause *p, enum pause_redis_state new)
{
	if (p->state == new)
		return;
	if (new == PAUSE_REDIS_UP || p->state == PAUSE_REDIS_UP)
		log_info("pause: Redis %s -> %s queued=%u",
		    pause_redis_state_name(p->state),
		    pause_redis_state_name(new), p->nqueue);
	else
		log_debug("pause: Redis %s -> %s",
		    pause_redis_state_name(p->state),
		    pause_redis_state_name(new));
	p->state = new;
}

static json_t *
pause_evidence(const struct finding *f)
{
	json_t *e, *arms;
	int i;

	arms = json_array();
	for (i = 0; i < f->narms; i++)
		json_array_append_new(arms, json_pack("{s:s, s:o, s:I, s:o, "
		    "s:o, s:o}", "variant", f->arms[i].variant, "weight",
		    finding_num(f->arms[i].weight), "exposures",
		    (json_int_t)f->arms[i].exposures, "n",
		    finding_num(f->arms[i].n), "k", finding_num(f->arms[i].k),
		    "value", finding_num(f->arms[i].value)));
	e = json_pack("{s:s?, s:s?, s:s?, s:o, s:o, s:o, s:i, s:o, s:o, s:o, "
	    "s:o, s:o, s:o, s:b, s:o}", "metric", f->metric, "test", f->test,
	    "harm", f->harm, "p", finding_num(f->p), "alpha",
	    finding_num(f->alpha), "pause_alpha",
	    finding_num(f->pause_level), "family", f->family, "estimate",
	    finding_num(f->estimate), "lower", finding_num(f->lower), "upper",
	    finding_num(f->upper), "rel_estimate", finding_num(f->rel_estimate),
	    "rel_lower", finding_num(f->rel_lower), "rel_upper",
	    finding_num(f->rel_upper), "untrusted", f->untrusted, "arms", arms);
	if (e != NULL)
		json_object_set_new(e, "untrusted_records",
		    json_integer((json_int_t)f->untrusted_records));
	return e;
}

static char *
pause_reason(const struct finding *f)
{
	char *s;

	if (f->kind == FINDING_SRM)
		xasprintf(&s, "sample ratio mismatch in experiment %s epoch %u "
		    "(p=%.3g)", f->experiment, f->epoch, f->p);
	else
		xasprintf(&s, "guardrail %s shows harm for %s in experiment %s "
		    "epoch %u (p=%.3g <= pause level %.3g)", f->guardrail,
		    f->variant ? f->variant : "?", f->experiment, f->epoch,
		    f->p, f->pause_level);
	return s;
}

/* One JSON line per decision; O_APPEND keeps lines whole. */
static void
pause_audit(struct pause *p, const struct finding *f,
    enum pause_decision dec, double now)
{
	json_t *j;
	char *text;
	size_t len, off = 0;
	ssize_t n;

	if (p->audit_fd == -1)
		return;
	j = json_pack("{s:f, s:s, s:I, s:s?, s:s?, s:s, s:s, s:b, s:o}",
	    "time", now, "experiment", f->experiment, "epoch",
	    (json_int_t)f->epoch, "guardrail", f->guardrail, "variant",
	    f->variant, "decision", pause_names[dec].decision, "reason",
	    dec == PAUSE_PAUSED && f->kind == FINDING_SRM ?
	    "sample ratio mismatch (allow_srm)" : pause_names[dec].reason,
	    "srm", f->kind == FINDING_SRM, "evidence",
	    pause_evidence(f));
	if (j == NULL || (text = json_dumps(j, JSON_COMPACT)) == NULL) {
		json_decref(j);
		p->audit_errors++;
		return;
	}
	json_decref(j);
	len = strlen(text);
	text[len++] = '\n';	/* json_dumps' NUL becomes the newline */
	while (off < len) {
		n = write(p->audit_fd, text + off, len - off);
		if (n == -1 && errno == EINTR)
			continue;
		if (n <= 0) {
			log_warn("pause: audit %s", p->audit_path);
			p->audit_errors++;
			break;
		}
		off += (size_t)n;
	}
	if (off == len && fdatasync(p->audit_fd) == -1)
		p->audit_errors++;
	free(text);
}

/*
 * SIGHUP: reopen the audit log by its name, so a rotated file (logrotate
 * renames it, then signals) is left behind and lines go to a new one. What
 * the policy remembers (once per epoch, the hourly window) stays in memory.
 */
void
pause_reopen(struct pause *p)
{
	int fd;

	if (p == NULL || p->audit_path == NULL)
		return;
	fd = open(p->audit_path, O_RDWR | O_APPEND | O_CREAT | O_CLOEXEC, 0640);
	if (fd == -1) {
		log_warn("pause: reopen %s (audit lines go to the old file)",
		    p->audit_path);
		p->audit_errors++;
		return;
	}
	if (p->audit_fd != -1)
		close(p->audit_fd);
	p->audit_fd = fd;
}

static int
pause_is_done(struct pause *p, const char *experiment, uint32_t epoch)
{
	size_t i;

	for (i = 0; i < p->ndone; i++)
		if (p->done[i].epoch == epoch &&
		    strcmp(p->done[i].experiment, experiment) == 0)
			return 1;
	return 0;
}

static void
pause_mark_done(struct pause *p, const char *experiment, uint32_t epoch)
{
	struct pause_done *d;

	if (pause_is_done(p, experiment, epoch))
		return;
	d = &p->done[p->done_next];
	snprintf(d->experiment, sizeof d->experiment, "%s", experiment);
	d->epoch = epoch;
	p->done_next = (p->done_next + 1) % PAUSE_DONE_MAX;
	if (p->ndone < PAUSE_DONE_MAX)
		p->ndone++;
}

/* 1 when another pause now would exceed pause_max_per_hour. */
static int
pause_rate_limited(struct pause *p, double now)
{
	uint32_t i, recent = 0;

	if (p->rate == 0)
		return 0;
	for (i = 0; i < p->ntimes; i++)
		if (now - p->times[i] < 3600)
			recent++;
	return recent >= p->rate;
}

static void
pause_rate_add(struct pause *p, double t, const char *experiment)
{
	if (p->rate == 0)
		return;
	snprintf(p->times_of[p->times_next].experiment,
	    sizeof p->times_of[p->times_next].experiment, "%s", experiment);
	p->times[p->times_next] = t;
	p->times_next = (p->times_next + 1) % p->rate;
	if (p->ntimes < p->rate)
		p->ntimes++;
}

/* %e -> experiment id, %% -> %. NULL when the result is too long. */
static char *
pause_expand(const char *tmpl, const char *experiment)
{
	char buf[PAUSE_KEY_MAX + 1];
	size_t len = 0, add;
	const char *s, *piece;

	for (s = tmpl; *s != '\0'; s++) {
		piece = s;
		add = 1;
		if (s[0] == '%' && s[1] == 'e') {
			piece = experiment;
			add = strlen(experiment);
			s++;
		} else if (s[0] == '%' && s[1] == '%')
			s++;
		if (len + add > PAUSE_KEY_MAX)
			return NULL;
		memcpy(buf + len, piece, add);
		len += add;
	}
	buf[len] = '\0';
	return xstrdup(buf);
}

static void
pause_op_free(struct pause_op *op)
{
	free(op->arg);
	free(op->value);
	free(op);
}

static void
pause_requeue(struct pause *p, struct pause_op *op)
{
	struct pause_op *at;

	TAILQ_FOREACH(at, &p->queue, entry)
		if (at->seq > op->seq)
			break;
	if (at != NULL)
		TAILQ_INSERT_BEFORE(at, op, entry);
	else
		TAILQ_INSERT_TAIL(&p->queue, op, entry);
	p->nqueue++;
	while (p->nqueue > PAUSE_OPS_MAX) {
		at = TAILQ_FIRST(&p->queue);
		TAILQ_REMOVE(&p->queue, at, entry);
		p->nqueue--;
		p->redis_dropped++;
		log_warnx("pause: Redis queue full, dropped %s %s", at->verb,
		    at->arg);
		pause_op_free(at);
	}
}

static void
pause_redis_reply(redisAsyncContext *ac, void *r, void *arg)
{
	struct pause_op *op = arg;
	struct pause *p = op->p;
	redisReply *reply = r;

	TAILQ_REMOVE(&p->sent, op, entry);
	if (p->freeing) {
		pause_op_free(op);
		return;
	}
	if (reply == NULL) {
		/* The connection went away: send again once it is back. */
		pause_requeue(p, op);
		return;
	}
	if (reply->type == REDIS_REPLY_ERROR) {
		p->redis_errors++;
		log_warnx("pause: Redis %s %s: %s", op->verb, op->arg,
		    reply->str);
	} else {
		p->redis_ok++;
		log_info("pause: Redis %s %s done", op->verb, op->arg);
	}
	pause_op_free(op);
}

static void
pause_redis_flush(struct pause *p)
{
	struct pause_op *op;

	while (p->state == PAUSE_REDIS_UP &&
	    (op = TAILQ_FIRST(&p->queue)) != NULL) {
		TAILQ_REMOVE(&p->queue, op, entry);
		p->nqueue--;
		if (redisAsyncCommand(p->rc, pause_redis_reply, op, "%s %s %s",
		    op->verb, op->arg, op->value) != REDIS_OK) {
			p->redis_errors++;
			pause_requeue(p, op);
			return;
		}
		TAILQ_INSERT_TAIL(&p->sent, op, entry);
	}
}

static void
pause_redis_push(struct pause *p, const char *verb, const char *arg,
    const char *value)
{
	struct pause_op *op;

	op = xcalloc(1, sizeof *op);
	op->p = p;
	op->seq = p->seq++;
	op->verb = verb;
	op->arg = xstrdup(arg);
	op->value = xstrdup(value);
	pause_requeue(p, op);
	pause_redis_flush(p);
}

static void
pause_redis_later(struct pause *p)
{
	struct timeval tv;

	pause_redis_set_state(p, PAUSE_REDIS_DOWN);
	tv.tv_sec = (time_t)p->backoff;
	tv.tv_usec = (suseconds_t)((p->backoff - (double)tv.tv_sec) * 1e6);
	evtimer_add(p->reconnect, &tv);
	p->backoff *= 2;
	if (p->backoff > PAUSE_BACKOFF_MAX)
		p->backoff = PAUSE_BACKOFF_MAX;
}

static void
pause_redis_connected(const redisAsyncContext *ac, int status)
{
	struct pause *p = ac->data;

	if (status != REDIS_OK) {
		/* hiredis frees the context after this callback. */
		log_warnx("pause: Redis connect failed: %s", ac->errstr);
		p->rc = NULL;
		pause_redis_later(p);
		return;
	}
	pause_redis_set_state(p, PAUSE_REDIS_UP);
	p->backoff = PAUSE_BACKOFF_MIN;
	pause_redis_flush(p);
}

static void
pause_redis_disconnected(const redisAsyncContext *ac, int status)
{
	struct pause *p = ac->data;

	p->rc = NULL;
	if (p->freeing)
		return;
	log_warnx("pause: Redis connection lost: %s",
	    status == REDIS_OK ? "closed" : ac->errstr);
	pause_redis_later(p);
}

static void
pause_reconnect_event(evutil_socket_t fd, short what, void *arg)
{
	pause_redis_connect(arg);
}

static void
pause_redis_connect(struct pause *p)
{
	redisAsyncContext *ac;

	if (p->unix_path != NULL)
		ac = redisAsyncConnectUnix(p->unix_path);
	else
		ac = redisAsyncConnect(p->host, p->port);
	if (ac == NULL || ac->err) {
		log_warnx("pause: Redis connect: %s", ac ? ac->errstr :
		    "out of memory");
		if (ac != NULL)
			redisAsyncFree(ac);
		pause_redis_later(p);
		return;
	}
	ac->data = p;
	if (redisLibeventAttach(ac, p->d->base) != REDIS_OK ||
	    redisAsyncSetConnectCallback(ac, pause_redis_connected) !=
	    REDIS_OK ||
	    redisAsyncSetDisconnectCallback(ac, pause_redis_disconnected) !=
	    REDIS_OK) {
		redisAsyncFree(ac);
		pause_redis_later(p);
		return;
	}
	p->rc = ac;
	pause_redis_set_state(p, PAUSE_REDIS_CONNECTING);
}

/* The [redis] address: "host:port", "[v6]:port" or a socket path. */
static int
pause_redis_address(struct pause *p, const char *addr, char **cause)
{
	struct addr a;
	char *why = NULL;

	if (addr_parse(addr, ADDR_PATH_OK, &a, &why) != 0) {
		xasprintf(cause, "pause: Redis %s", why);
		free(why);
		return -1;
	}
	if (a.is_path)
		p->unix_path = xstrdup(a.path);
	else {
		p->host = xstrdup(a.host);
		p->port = a.port;
	}
	return 0;
}

/* Rebuild once-per-epoch and the hourly window from the audit tail. */
static void
pause_audit_reload(struct pause *p)
{
	char *buf, *line, *nl;
	off_t size, start;
	ssize_t n;
	json_t *j;
	const char *exp, *dec;
	json_int_t epoch;
	double t, now = daemon_now();

	if ((size = lseek(p->audit_fd, 0, SEEK_END)) <= 0)
		return;
	start = size > PAUSE_AUDIT_TAIL ? size - PAUSE_AUDIT_TAIL : 0;
	buf = xmalloc((size_t)(size - start) + 1);
	n = pread(p->audit_fd, buf, (size_t)(size - start), start);
	if (n <= 0) {
		free(buf);
		return;
	}
	buf[n] = '\0';
	line = buf;
	if (start > 0 && (line = strchr(buf, '\n')) != NULL)
		line++;	/* the first line is cut */
	for (; line != NULL && *line != '\0'; line = nl ? nl + 1 : NULL) {
		if ((nl = strchr(line, '\n')) != NULL)
			*nl = '\0';
		if ((j = json_loads(line, 0, NULL)) == NULL)
			continue;
		if (json_unpack(j, "{s:F, s:s, s:I, s:s}", "time", &t,
		    "experiment", &exp, "epoch", &epoch, "decision", &dec) ==
		    0 && epoch > 0 && epoch <= UINT32_MAX &&
		    strlen(exp) <= PROTO_NAME_MAX &&
		    (strcmp(dec, pause_names[PAUSE_PAUSED].decision) == 0 ||
		    strcmp(dec, pause_names[PAUSE_DRY_RUN].decision) == 0)) {
			pause_mark_done(p, exp, (uint32_t)epoch);
			if (strcmp(dec, pause_names[PAUSE_PAUSED].decision) ==
			    0 && now - t < 3600)
				pause_rate_add(p, t, exp);
		}
		json_decref(j);
	}
	free(buf);
}

struct pause *
pause_new(struct daemon *d, char **cause)
{
	const struct conf *c = d->conf;
	struct pause *p;
	int redis_wanted;

	p = xcalloc(1, sizeof *p);	/* state PAUSE_REDIS_OFF */
	p->d = d;
	p->audit_fd = -1;
	TAILQ_INIT(&p->queue);
	TAILQ_INIT(&p->sent);
	p->seq = 1;
	p->backoff = PAUSE_BACKOFF_MIN;
	p->rate = c->pause_max_per_hour > PAUSE_RATE_MAX ? PAUSE_RATE_MAX :
	    c->pause_max_per_hour;
	if (p->rate > 0) {
		p->times = xcalloc(p->rate, sizeof *p->times);
		p->times_of = xcalloc(p->rate, sizeof *p->times_of);
	}

	if (c->state_dir != NULL) {
		xasprintf(&p->audit_path, "%s/pause-audit.log", c->state_dir);
		p->audit_fd = open(p->audit_path, O_RDWR | O_APPEND | O_CREAT |
		    O_CLOEXEC, 0640);
		if (p->audit_fd == -1) {
			xasprintf(cause, "pause: open %s: %s", p->audit_path,
			    strerror(errno));
			pause_free(p);
			return NULL;
		}
		pause_audit_reload(p);
	} else
		log_warnx("pause: no state_dir, no audit log is kept");

	redis_wanted = (c->pause_redis_key != NULL &&
	    *c->pause_redis_key != '\0') || (c->pause_redis_channel != NULL &&
	    *c->pause_redis_channel != '\0');
	if (redis_wanted && c->redis_address == NULL)
		log_warnx("pause: redis_key/redis_channel set but no [redis] "
		    "address; pauses go to Redis nowhere");
	if (redis_wanted && c->redis_address != NULL) {
		if (pause_redis_address(p, c->redis_address, cause) == -1) {
			pause_free(p);
			return NULL;
		}
		if ((p->reconnect = evtimer_new(d->base, pause_reconnect_event,
		    p)) == NULL)
			fatalx("pause: evtimer_new failed");
		pause_redis_connect(p);
	}
	return p;
}

void
pause_free(struct pause *p)
{
	struct pause_op *op;

	if (p == NULL)
		return;
	p->freeing = 1;
	if (p->rc != NULL)
		redisAsyncFree(p->rc);	/* replies come back NULL */
	while ((op = TAILQ_FIRST(&p->sent)) != NULL) {
		TAILQ_REMOVE(&p->sent, op, entry);
		pause_op_free(op);
	}
	while ((op = TAILQ_FIRST(&p->queue)) != NULL) {
		TAILQ_REMOVE(&p->queue, op, entry);
		pause_op_free(op);
	}
	if (p->nqueue > 0)
		log_warnx("pause: %u Redis commands not sent", p->nqueue);
	if (p->reconnect != NULL)
		event_free(p->reconnect);
	if (p->audit_fd != -1)
		close(p->audit_fd);
	free(p->audit_path);
	free(p->times);
	free(p->times_of);
	free(p->host);
	free(p->unix_path);
	free(p);
}

/* The pause itself: HTTP (spooled, signed) and Redis SET + PUBLISH. */
void
pause_deliver(struct pause *p, const struct finding *f, const char *reason)
{
	const struct conf *c;
	double now = daemon_now();
	char id[3 + 2 * PAUSE_ID_BYTES + 1], *s, *key, *value;
	json_t *j;
	int n;

	if (p == NULL || f == NULL || f->experiment == NULL)
		return;
	c = p->d->conf;
	/* The webhook-id is stable per experiment and epoch. */
	n = xasprintf(&s, "%s%c%u%cpause", f->experiment, 0, f->epoch, 0);
	memcpy(id, "sp_", 3);
	digest_sha256_hex(s, (size_t)n, PAUSE_ID_BYTES, id + 3);
	free(s);

	j = json_pack("{s:s, s:s, s:s, s:I, s:s?, s:s?, s:f, s:s, s:o}",
	    "id", id, "type", "stopcock.pause", "experiment", f->experiment,
	    "epoch", (json_int_t)f->epoch, "guardrail", f->guardrail,
	    "variant", f->variant, "paused_at", now, "reason", reason,
	    "evidence", pause_evidence(f));
	if (j == NULL) {
		log_warnx("pause: cannot build the pause message");
		return;
	}
	if (c->pause_url != NULL && *c->pause_url != '\0') {
		if (webhook_post(p->d->webhook, WEBHOOK_PAUSE, id, j) == 0)
			p->http_queued++;
		else
			log_warnx("pause: no webhook machinery for %s",
			    c->pause_url);
	}
	if (p->state != PAUSE_REDIS_OFF &&
	    (value = json_dumps(j, JSON_COMPACT)) != NULL) {
		if (c->pause_redis_key != NULL && *c->pause_redis_key != '\0') {
			if ((key = pause_expand(c->pause_redis_key,
			    f->experiment)) != NULL) {
				pause_redis_push(p, "SET", key, value);
				free(key);
			} else
				log_warnx("pause: Redis key too long for %s",
				    f->experiment);
		}
		if (c->pause_redis_channel != NULL &&
		    *c->pause_redis_channel != '\0')
			pause_redis_push(p, "PUBLISH", c->pause_redis_channel,
			    value);
		free(value);
	}
	json_decref(j);
}

enum pause_decision
pause_decide(struct pause *p, const struct finding *f, char **reason)
{
	const struct conf *c;
	enum pause_decision dec;
	double now = daemon_now();
	int srm;

	*reason = NULL;
	if (p == NULL || f == NULL || f->experiment == NULL)
		return PAUSE_NONE;
	c = p->d->conf;
	srm = f->kind == FINDING_SRM;
	if (f->kind != FINDING_PAUSE && !(srm &&
	    f->verdict != VERDICT_UNDECIDED))
		return PAUSE_NONE;
	if (srm && !c->pause_on_srm)
		return PAUSE_NONE;	/* it alerts; it pauses if allowed */

	if (f->untrusted_records > 0)
		dec = PAUSE_REFUSED_UNTRUSTED_INPUT;
	else if (f->untrusted && !srm)
		dec = PAUSE_REFUSED_UNTRUSTED;
	else if (pause_is_done(p, f->experiment, f->epoch))
		dec = PAUSE_REFUSED_REPEAT;
	else if (c->pause_dry_run)
		dec = PAUSE_DRY_RUN;
	else if (pause_rate_limited(p, now))
		dec = PAUSE_REFUSED_RATE;
	else
		dec = PAUSE_PAUSED;
	p->decisions[dec]++;
	pause_audit(p, f, dec, now);
	*reason = pause_reason(f);

	switch (dec) {
	case PAUSE_PAUSED:
		pause_mark_done(p, f->experiment, f->epoch);
		pause_rate_add(p, now, f->experiment);
		log_warnx("pause: pausing experiment=%s epoch=%u guardrail=%s "
		    "variant=%s p=%.3g", f->experiment, f->epoch,
		    f->guardrail ? f->guardrail : "srm",
		    f->variant ? f->variant : "-", f->p);
		break;
	case PAUSE_DRY_RUN:
		pause_mark_done(p, f->experiment, f->epoch);
		log_warnx("pause: dry run, would pause experiment=%s epoch=%u "
		    "guardrail=%s variant=%s p=%.3g", f->experiment, f->epoch,
		    f->guardrail ? f->guardrail : "srm",
		    f->variant ? f->variant : "-", f->p);
		break;
	default:
		log_warnx("pause: not pausing experiment=%s epoch=%u "
		    "guardrail=%s variant=%s reason=%s", f->experiment,
		    f->epoch, f->guardrail ? f->guardrail : "srm",
		    f->variant ? f->variant : "-", pause_names[dec].reason);
		break;
	}
	return dec;
}

/*
 * What a Kafka partition carries to its next owner, for the experiments
 * mine() accepts: {"done": [[ID, epoch]...], "times": [[ID, t]...]},
 * the epochs already paused (or dry-run) and this hour's pauses, so the
 * new owner keeps once-per-epoch and counts them in its hourly limit.
 */
json_t *
pause_carry(struct pause *p, int (*mine)(void *, const char *), void *arg)
{
	json_t *done = json_array(), *times = json_array();
	double now = daemon_now();
	size_t i;

	for (i = 0; p != NULL && i < p->ndone; i++)
		if (mine(arg, p->done[i].experiment))
			json_array_append_new(done, json_pack("[s, I]",
			    p->done[i].experiment,
			    (json_int_t)p->done[i].epoch));
	for (i = 0; p != NULL && i < p->ntimes; i++)
		if (now - p->times[i] < 3600 &&
		    mine(arg, p->times_of[i].experiment))
			json_array_append_new(times, json_pack("[s, f]",
			    p->times_of[i].experiment, p->times[i]));
	return json_pack("{s:o, s:o}", "done", done, "times", times);
}

void
pause_adopt(struct pause *p, const json_t *carried)
{
	const json_t *v;
	const char *exp;
	json_int_t epoch;
	double t, now = daemon_now();
	size_t i, j;

	if (p == NULL)
		return;
	json_array_foreach(json_object_get(carried, "done"), i, v)
		if (json_unpack((json_t *)v, "[s, I]", &exp, &epoch) == 0 &&
		    epoch > 0 && epoch <= UINT32_MAX &&
		    strlen(exp) <= PROTO_NAME_MAX)
			pause_mark_done(p, exp, (uint32_t)epoch);
	json_array_foreach(json_object_get(carried, "times"), i, v) {
		if (json_unpack((json_t *)v, "[s, F]", &exp, &t) != 0 ||
		    !(now - t < 3600) || strlen(exp) > PROTO_NAME_MAX)
			continue;
		for (j = 0; j < p->ntimes; j++)
			if (p->times[j] == t &&
			    strcmp(p->times_of[j].experiment, exp) == 0)
				break;	/* this daemon counts it already */
		if (j == p->ntimes)
			pause_rate_add(p, t, exp);
	}
}

void
pause_metrics(struct pause *p, struct evbuffer *b)
{
	int i;

	if (p == NULL)
		return;
	metrics_family(b, "stopcock_pause_decisions_total", "counter",
	    "Pause decisions, by decision and reason.");
	for (i = PAUSE_PAUSED; i < PAUSE_NDECISIONS; i++)
		evbuffer_add_printf(b, "stopcock_pause_decisions_total"
		    "{decision=\"%s\",reason=\"%s\"} %llu\n",
		    pause_names[i].decision, i == PAUSE_PAUSED ? "harm" :
		    i == PAUSE_DRY_RUN ? "dry_run" : pause_names[i].reason,
		    (unsigned long long)p->decisions[i]);
	metrics_family(b, "stopcock_pause_redis_commands_total", "counter",
	    "Redis SET/PUBLISH commands for pauses, by outcome.");
	evbuffer_add_printf(b,
	    "stopcock_pause_redis_commands_total{outcome=\"ok\"} %llu\n"
	    "stopcock_pause_redis_commands_total{outcome=\"error\"} %llu\n"
	    "stopcock_pause_redis_commands_total{outcome=\"dropped\"} %llu\n",
	    (unsigned long long)p->redis_ok,
	    (unsigned long long)p->redis_errors,
	    (unsigned long long)p->redis_dropped);
	metrics_gauge(b, "stopcock_pause_redis_pending", "Redis commands for "
	    "pauses not yet answered.", p->nqueue);
	metrics_gauge(b, "stopcock_pause_redis_up", "1 when the pause Redis "
	    "connection is up.", p->state == PAUSE_REDIS_UP);
	metrics_counter(b, "stopcock_pause_http_queued_total", "Pauses handed "
	    "to the pause URL's queue.", p->http_queued);
	metrics_counter(b, "stopcock_pause_audit_errors_total", "Audit lines "
	    "that could not be written.", p->audit_errors);
}
