/*
 * listen.c: the socket inputs. TCP and Unix stream clients send records
 * one per line (plain or JSON lines); UDP datagrams carry one or more
 * lines each, up to 64 KiB. Every complete line goes to ingest.c.
 *
 * Stream clients are bufferevents with a read watermark of
 * conf->client_buffer, so a client that sends faster than we parse is
 * throttled by TCP itself. Each read callback makes the input contiguous
 * once, walks every complete line with memchr and drains them in one go:
 * no per-line allocation or libevent call, which keeps the hot path at
 * millions of lines a second.
 *
 * An input with tcp_signed or unix_signed takes only signed batches
 * (frame.h): listen_client_frames cuts them off the stream and auth.c
 * verifies each; with udp_signed each datagram is one batch. The unix
 * socket gets unix_mode and unix_group at bind, so its file says who may
 * write (which is why it may be trusted unsigned).
 *
 * A slow or hostile client costs only its own connection: a line over
 * PROTO_LINE_MAX is skipped up to its newline and counted as too_long;
 * a client is cut off when it has sent more than LISTEN_BAD_MAX bad lines
 * and more bad lines than good ones ("garbage"), or when one over-long
 * line runs past client_buffer bytes without a newline ("line_flood").
 * A client that sends nothing for client_idle_timeout is closed
 * ("idle"), and so is one whose line has not ended client_line_timeout
 * after its first byte ("slow_line": bytes trickling without a newline).
 * One timer sweeps for both: each input's clients are kept in order of
 * their last read and those with an unfinished line in order of its
 * start, so a sweep looks only at the clients it closes.
 *
 * Limits that hold under a flood: one source (a TCP peer's IPv4 address
 * or IPv6 /64, a unix peer's user id) holds at most
 * max_clients_per_source connections; all inputs together hold at most
 * max_clients, and when that is reached a connection on an input holding
 * less than its share (max_clients over the stream inputs) closes the
 * longest-idle client of the input holding more ("evicted"), so a flood
 * on TCP cannot lock out the Unix socket. Every refusal is counted; when
 * accept fails for lack of descriptors the listeners pause for a second.
 *
 * A client is never freed inside its own callbacks: it moves to the dead
 * list and a deferred event reaps it.
 */
#include <sys/types.h>
#include <sys/queue.h>
#include <sys/socket.h>

#include <netinet/in.h>
#include <arpa/inet.h>

#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include <event2/buffer.h>
#include <event2/bufferevent.h>
#include <event2/event.h>
#include <event2/listener.h>

#include "stopcock/addr.h"
#include "stopcock/frame.h"
#include "stopcock/log.h"
#include "stopcock/names.h"
#include "daemon.h"

#include "listen_int.h"

static const char *listen_cut_names[CUT_N] = { "garbage", "line_flood" };

static const char *listen_close_names[CLOSE_N] = {
	"idle", "slow_line", "evicted"
};

static const char *listen_refuse_names[REFUSE_N] = {
	"max_clients", "max_clients_per_source"
};

static const enum source listen_streams[] = { SRC_TCP, SRC_UNIX };

static uint64_t
listen_now_ms(void)
{
	struct timespec ts;

	clock_gettime(CLOCK_MONOTONIC, &ts);
	return (uint64_t)ts.tv_sec * 1000 + (uint64_t)ts.tv_nsec / 1000000;
}

static uint64_t
listen_ms(double seconds)
{
	return seconds > 0 ? (uint64_t)(seconds * 1000 + 0.5) : 0;
}

/* Connections from one source: +1 or -1; the entry goes at zero. */
static uint32_t
listen_source_add(struct listen *l, const struct client *c, int delta)
{
	uint32_t n = 0;

	(void)nmap_get(l->per_source, (const char *)c->key, c->keylen, &n);
	if (delta < 0 && n <= 1) {
		(void)nmap_del(l->per_source, (const char *)c->key, c->keylen);
		return 0;
	}
	n = delta < 0 ? n - 1 : n + 1;
	nmap_put(l->per_source, (const char *)c->key, c->keylen, n);
	return n;
}

static void
listen_client_finished(struct client *c)
{
	if (c->unfinished) {
		TAILQ_REMOVE(&c->l->unfinished, c, uentry);
		c->unfinished = 0;
	}
}

static const char *
listen_client_state_name(enum client_state s)
{
	switch (s) {
	case CLIENT_READING:
		return "reading";
	case CLIENT_DISCARDING:
		return "discarding";
	case CLIENT_DEAD:
		return "dead";
	}
	return "?";
}

/* The one place a client changes state. */
static void
listen_client_set_state(struct client *c, enum client_state new)
{
	struct listen *l = c->l;

	if (c->state == new)
		return;
	log_debug("listen: client %s -> %s client=%" PRIu64 " source=%s",
	    listen_client_state_name(c->state), listen_client_state_name(new),
	    c->id, source_name(c->src));
	if (new == CLIENT_DEAD) {
		bufferevent_disable(c->bev, EV_READ | EV_WRITE);
		listen_client_finished(c);
		TAILQ_REMOVE(&l->clients[c->src], c, entry);
		TAILQ_INSERT_TAIL(&l->dead, c, entry);
		l->nclients--;
		l->nby[c->src]--;
		(void)listen_source_add(l, c, -1);
		event_active(l->reap_ev, EV_TIMEOUT, 0);
	}
	c->state = new;
}

static void
listen_client_free(struct client *c)
{
	bufferevent_free(c->bev);
	free(c);
}

/* Deferred: frees the clients that died in their own callbacks. */
static void
listen_reap_cb(evutil_socket_t fd, short what, void *arg)
{
	struct listen *l = arg;
	struct client *c;

	while ((c = TAILQ_FIRST(&l->dead)) != NULL) {
		TAILQ_REMOVE(&l->dead, c, entry);
		listen_client_free(c);
	}
}

static size_t
listen_buffer(struct listen *l, enum source src)
{
	size_t b = l->d->conf->client_buffer;

	/* A line at the limit plus its newline must always fit; on a
	 * signed input, a whole frame. */
	if (b < 2 * (PROTO_LINE_MAX + 1))
		b = 2 * (PROTO_LINE_MAX + 1);
	if (auth_signed(l->d->conf, src) && b < FRAME_HEADER_MAX +
	    FRAME_BODY_MAX)
		b = FRAME_HEADER_MAX + FRAME_BODY_MAX;
	return b;
}

static void
listen_client_cut(struct client *c, enum listen_cut why)
{
	struct listen *l = c->l;

	l->cut[c->src][why]++;
	log_warnx("listen: client cut off: %s client=%" PRIu64 " source=%s "
	    "peer=%s good=%" PRIu64 " bad=%" PRIu64, listen_cut_names[why],
	    c->id, source_name(c->src), c->peer, c->good, c->bad);
	listen_client_set_state(c, CLIENT_DEAD);
}

/* Once per client: it dies here. */
static void
listen_client_close(struct client *c, enum listen_close why, uint64_t now)
{
	struct listen *l = c->l;
	uint64_t since = why == CLOSE_SLOW ? c->line_ms : c->last_ms;

	l->closed[c->src][why]++;
	log_warnx("listen: client closed: %s client=%" PRIu64 " source=%s "
	    "peer=%s waited_ms=%" PRIu64 " good=%" PRIu64 " bad=%" PRIu64,
	    listen_close_names[why], c->id, source_name(c->src), c->peer,
	    now - since, c->good, c->bad);
	listen_client_set_state(c, CLIENT_DEAD);
}

static void
listen_client_line(struct client *c, const char *p, size_t n)
{
	switch (ingest_line_status(c->l->d, c->src, p, n)) {
	case INGEST_OK:
		c->good++;
		break;
	case INGEST_BAD_LINE:
		c->bad++;
		break;
	default:
		break;
	}
}

static void
listen_client_too_long(struct client *c, const char *p, size_t n)
{
	ingest_reject(c->l->d, c->src, PROTO_E_LONG, n, p, n);
	c->bad++;
}

/* Could p[0..n), with more bytes, still become a frame's header? */
static int
listen_header_prefix(const char *p, size_t n)
{
	return n < FRAME_KEYWORD_LEN && memchr(p, '\n', n) == NULL &&
	    memcmp(p, FRAME_KEYWORD, n) == 0;
}

/*
 * A signed input: frames (frame.h) one after another, blank lines
 * between them allowed. Whatever is not a frame costs one refusal per
 * run (unsigned, malformed_frame) and is skipped up to the next line
 * that begins a header, so a bad batch never takes the good ones after
 * it. Returns the bytes consumed; *ended: a frame or line ended.
 */
static size_t
listen_client_frames(struct client *c, const char *p, size_t len, int eof,
    int *ended)
{
	struct daemon *d = c->l->d;
	size_t off = 0, rest, limit = listen_buffer(c->l, c->src);
	enum frame_status st;
	struct frame f;
	const char *nl;

	while (off < len && c->state != CLIENT_DEAD) {
		rest = len - off;
		if (c->state == CLIENT_DISCARDING) {
			if (!c->skip_line) {
				if (frame_is_header(p + off, rest)) {
					listen_client_set_state(c,
					    CLIENT_READING);
					continue;
				}
				if (!eof && listen_header_prefix(p + off, rest))
					break;
				c->skip_line = 1;
			}
			if ((nl = memchr(p + off, '\n', rest)) == NULL) {
				c->discarded += rest;
				off = len;
				if (c->discarded > limit)
					listen_client_cut(c, CUT_FLOOD);
				break;
			}
			off = (size_t)(nl - p) + 1;
			c->skip_line = 0;
			c->discarded = 0;
			*ended = 1;
			continue;
		}
		if (p[off] == '\n' || (rest >= 2 && p[off] == '\r' &&
		    p[off + 1] == '\n')) {
			off += p[off] == '\n' ? 1 : 2;
			*ended = 1;
			continue;
		}
		if (!frame_is_header(p + off, rest)) {
			if (!eof && (listen_header_prefix(p + off, rest) ||
			    (rest == 1 && p[off] == '\r')))
				break;
			auth_refuse(d, c->src, AUTH_UNSIGNED, NULL, rest);
			c->bad++;
			c->skip_line = 1;
			listen_client_set_state(c, CLIENT_DISCARDING);
			continue;
		}
		st = frame_parse(p + off, rest, &f);
		if (st == FRAME_PARTIAL && !eof)
			break;
		if (st == FRAME_OK) {
			if (auth_batch(d, c->src, &f, p + off + f.header_len) ==
			    0)
				c->good++;
			else
				c->bad++;
			off += f.header_len + f.body_len;
			*ended = 1;
			continue;
		}
		/* malformed, over FRAME_BODY_MAX, or cut short by eof */
		auth_refuse(d, c->src, AUTH_MALFORMED,
		    f.producer[0] != '\0' ? &f : NULL, rest);
		c->bad++;
		off += f.header_len;
		if (f.header_len > 0)
			*ended = 1;
		c->skip_line = f.header_len == 0;
		listen_client_set_state(c, CLIENT_DISCARDING);
	}
	return off;
}

/* Plain lines, one record each; as listen_client_frames returns. */
static size_t
listen_client_lines(struct client *c, const char *p, size_t len, int eof,
    int *ended)
{
	size_t off = 0, n, limit = listen_buffer(c->l, c->src);
	const char *nl;

	while (off < len && c->state != CLIENT_DEAD) {
		nl = memchr(p + off, '\n', len - off);
		n = nl != NULL ? (size_t)(nl - (p + off)) : len - off;
		if (c->state == CLIENT_DISCARDING) {
			c->discarded += n;
			if (nl == NULL) {
				off = len;
				if (c->discarded > limit)
					listen_client_cut(c, CUT_FLOOD);
				break;
			}
			off += n + 1;
			*ended = 1;
			listen_client_set_state(c, CLIENT_READING);
			continue;
		}
		if (nl == NULL) {
			if (eof) {
				if (n > PROTO_LINE_MAX)
					listen_client_too_long(c, p + off, n);
				else
					listen_client_line(c, p + off, n);
				off = len;
			} else if (n > PROTO_LINE_MAX) {
				listen_client_too_long(c, p + off, n);
				c->discarded = n;
				off = len;
				listen_client_set_state(c, CLIENT_DISCARDING);
			}
			break;
		}
		if (n > PROTO_LINE_MAX)
			listen_client_too_long(c, p + off, n);
		else
			listen_client_line(c, p + off, n);
		off += n + 1;
		*ended = 1;
	}
	return off;
}

/*
 * Consume every complete line in the input. At eof a last line without
 * its newline still counts. Lines are parsed in place: the buffer is made
 * contiguous once per call and drained once at the end.
 */
static void
listen_client_input(struct client *c, int eof)
{
	struct listen *l = c->l;
	struct evbuffer *in = bufferevent_get_input(c->bev);
	size_t len = evbuffer_get_length(in), off = 0;
	const char *p;
	int ended = 0, skipping;

	if (len == 0 || c->state == CLIENT_DEAD) {
		evbuffer_drain(in, len);
		return;
	}
	/* Heard from: to the tail of its input's list, oldest read first. */
	c->last_ms = listen_now_ms();
	if (TAILQ_NEXT(c, entry) != NULL) {
		TAILQ_REMOVE(&l->clients[c->src], c, entry);
		TAILQ_INSERT_TAIL(&l->clients[c->src], c, entry);
	}
	p = (const char *)evbuffer_pullup(in, -1);
	if (auth_signed(l->d->conf, c->src))
		off = listen_client_frames(c, p, len, eof, &ended);
	else
		off = listen_client_lines(c, p, len, eof, &ended);
	evbuffer_drain(in, off);
	if (c->state != CLIENT_DEAD && c->bad > LISTEN_BAD_MAX &&
	    c->bad > c->good)
		listen_client_cut(c, CUT_GARBAGE);
	if (c->state == CLIENT_DEAD)
		return;
	/* A line left unfinished (kept, or being skipped) is timed from its
	 * first byte: a new one when a newline went by in this read. */
	skipping = c->state == CLIENT_DISCARDING &&
	    (!auth_signed(l->d->conf, c->src) || c->skip_line);
	if (off < len || skipping) {
		if (c->unfinished && ended)
			listen_client_finished(c);
		if (!c->unfinished) {
			c->line_ms = c->last_ms;
			c->unfinished = 1;
			TAILQ_INSERT_TAIL(&l->unfinished, c, uentry);
		}
	} else
		listen_client_finished(c);
}

static void
listen_client_read_cb(struct bufferevent *bev, void *arg)
{
	struct client *c = arg;

	listen_client_input(c, 0);
}

static void
listen_client_event_cb(struct bufferevent *bev, short what, void *arg)
{
	struct client *c = arg;

	if (what & BEV_EVENT_EOF) {
		listen_client_input(c, 1);
		log_debug("listen: client closed client=%" PRIu64 " source=%s "
		    "good=%" PRIu64 " bad=%" PRIu64, c->id, source_name(c->src),
		    c->good, c->bad);
	} else if (what & BEV_EVENT_ERROR) {
		log_debug("listen: client error: %s client=%" PRIu64
		    " source=%s", evutil_socket_error_to_string(
		    EVUTIL_SOCKET_ERROR()), c->id, source_name(c->src));
	}
	if (what & (BEV_EVENT_EOF | BEV_EVENT_ERROR))
		listen_client_set_state(c, CLIENT_DEAD);
}

/*
 * The source a connection is counted against: an IPv4 address (also when
 * mapped into IPv6), an IPv6 /64 (one host usually holds a whole /64), or
 * the peer's user id on the Unix socket. Also its printable name.
 */
static void
listen_source_key(struct client *c, evutil_socket_t fd,
    const struct sockaddr *sa, int salen)
{
	const struct sockaddr_in *sin = (const struct sockaddr_in *)sa;
	const struct sockaddr_in6 *sin6 = (const struct sockaddr_in6 *)sa;
	struct ucred uc;
	socklen_t uclen = sizeof uc;
	uint32_t uid;

	if (sa != NULL && sa->sa_family == AF_INET &&
	    (size_t)salen >= sizeof *sin) {
		c->key[0] = '4';
		memcpy(c->key + 1, &sin->sin_addr, 4);
		c->keylen = 5;
		inet_ntop(AF_INET, &sin->sin_addr, c->peer, sizeof c->peer);
	} else if (sa != NULL && sa->sa_family == AF_INET6 &&
	    (size_t)salen >= sizeof *sin6) {
		if (IN6_IS_ADDR_V4MAPPED(&sin6->sin6_addr)) {
			c->key[0] = '4';
			memcpy(c->key + 1, sin6->sin6_addr.s6_addr + 12, 4);
			c->keylen = 5;
		} else {
			c->key[0] = '6';
			memcpy(c->key + 1, sin6->sin6_addr.s6_addr, 8);
			c->keylen = 9;
		}
		inet_ntop(AF_INET6, &sin6->sin6_addr, c->peer, sizeof c->peer);
	} else {
		/* Unknown credentials all count as one source. */
		uid = UINT32_MAX;
		if (getsockopt(fd, SOL_SOCKET, SO_PEERCRED, &uc, &uclen) == 0)
			uid = (uint32_t)uc.uid;
		c->key[0] = 'u';
		memcpy(c->key + 1, &uid, sizeof uid);
		c->keylen = 1 + sizeof uid;
		snprintf(c->peer, sizeof c->peer, "uid:%ld", uid == UINT32_MAX ?
		    -1L : (long)uid);
	}
}

static void
listen_refuse(struct listen *l, const struct client *c, enum listen_refuse why,
    uint32_t held)
{
	/* Floods are logged once per thousand; every one is counted. */
	if (l->refused[why]++ % 1000 == 0)
		log_warnx("listen: connection refused: %s reached source=%s "
		    "peer=%s held=%u refused=%" PRIu64, listen_refuse_names[why],
		    source_name(c->src), c->peer, held, l->refused[why]);
}

/*
 * At max_clients: room for a connection on an input holding less than
 * its share, made by closing the longest-idle client of the input that
 * holds the most. 0 when there is room now.
 */
static int
listen_make_room(struct listen *l, enum source src, uint64_t now)
{
	struct listen_sock *socks[] = { &l->tcp, &l->unix_sock };
	enum source big = src;
	uint32_t inputs = 0, share;
	size_t i;

	for (i = 0; i < SC_NELEM(socks); i++)
		if (socks[i]->evl != NULL)
			inputs++;
	share = l->d->conf->max_clients / (inputs > 0 ? inputs : 1);
	if (l->nby[src] >= share)
		return -1;
	for (i = 0; i < SC_NELEM(listen_streams); i++)
		if (l->nby[listen_streams[i]] > l->nby[big])
			big = listen_streams[i];
	if (big == src || TAILQ_EMPTY(&l->clients[big]))
		return -1;
	listen_client_close(TAILQ_FIRST(&l->clients[big]), CLOSE_EVICT, now);
	return 0;
}

void
listen_accept_cb(struct evconnlistener *evl, evutil_socket_t fd,
    struct sockaddr *sa, int salen, void *arg)
{
	struct listen_sock *ls = arg;
	struct listen *l = ls->l;
	const struct conf *conf = l->d->conf;
	struct client *c;
	struct bufferevent *bev;
	size_t buf;
	uint32_t held = 0;
	uint64_t now = listen_now_ms();

	if (l->draining) {
		evutil_closesocket(fd);
		return;
	}
	c = xcalloc(1, sizeof *c);
	c->l = l;
	c->src = ls->src;
	listen_source_key(c, fd, ls->src == SRC_UNIX ? NULL : sa, salen);
	(void)nmap_get(l->per_source, (const char *)c->key, c->keylen, &held);
	if (held >= conf->max_clients_per_source) {
		listen_refuse(l, c, REFUSE_SOURCE, held);
		goto refuse;
	}
	/* One eviction at most: above the cap (max_clients lowered by a
	 * reload) connections are refused until enough have gone. */
	if (l->nclients >= conf->max_clients &&
	    (l->nclients > conf->max_clients ||
	    listen_make_room(l, ls->src, now) != 0)) {
		listen_refuse(l, c, REFUSE_CAP, l->nclients);
		goto refuse;
	}
	bev = bufferevent_socket_new(l->d->base, fd, BEV_OPT_CLOSE_ON_FREE);
	if (bev == NULL) {
		log_warnx("listen: bufferevent_socket_new failed source=%s",
		    source_name(ls->src));
		goto refuse;
	}
	c->state = CLIENT_READING;
	c->bev = bev;
	c->id = ++l->next_id;
	c->last_ms = now;
	buf = listen_buffer(l, c->src);
	bufferevent_setwatermark(bev, EV_READ, 0, buf);
	bufferevent_set_max_single_read(bev,
	    buf < LISTEN_READ_MAX ? buf : LISTEN_READ_MAX);
	bufferevent_setcb(bev, listen_client_read_cb, NULL,
	    listen_client_event_cb, c);
	if (bufferevent_enable(bev, EV_READ) != 0) {
		log_warnx("listen: cannot enable reading source=%s",
		    source_name(ls->src));
		listen_client_free(c);
		return;
	}
	TAILQ_INSERT_TAIL(&l->clients[c->src], c, entry);
	l->nclients++;
	l->nby[c->src]++;
	l->accepted[c->src]++;
	held = listen_source_add(l, c, 1);
	log_debug("listen: client connected client=%" PRIu64 " source=%s "
	    "peer=%s clients=%u from_peer=%u", c->id, source_name(c->src),
	    c->peer, l->nclients, held);
	return;
refuse:
	evutil_closesocket(fd);
	free(c);
}

static uint64_t
listen_sweep_period(const struct conf *conf)
{
	uint64_t p = LISTEN_SWEEP_MS, idle, line;

	/* A quarter of a timeout: closes come at most 25% late. */
	idle = listen_ms(conf->client_idle_timeout) / 4;
	line = listen_ms(conf->client_line_timeout) / 4;
	if (idle > 0 && idle < p)
		p = idle;
	if (line > 0 && line < p)
		p = line;
	return p < 10 ? 10 : p;
}

static void
listen_sweep_arm(struct listen *l)
{
	struct timeval tv;

	l->sweep_ms = listen_sweep_period(l->d->conf);
	tv.tv_sec = (time_t)(l->sweep_ms / 1000);
	tv.tv_usec = (suseconds_t)(l->sweep_ms % 1000) * 1000;
	event_add(l->sweep_ev, &tv);
}

/*
 * Close idle and slow clients. The heads of the lists are the oldest, so
 * each sweep stops at the first client still within its time. A sweep
 * that comes far too late (the loop was held up) closes nothing: the
 * clients' bytes may be waiting unread in the kernel.
 */
static void
listen_sweep_cb(evutil_socket_t fd, short what, void *arg)
{
	struct listen *l = arg;
	const struct conf *conf = l->d->conf;
	uint64_t now = listen_now_ms(), idle, line;
	struct client *c;
	size_t i;

	idle = listen_ms(conf->client_idle_timeout);
	line = listen_ms(conf->client_line_timeout);
	if (l->swept_ms != 0 && now - l->swept_ms > 3 * l->sweep_ms + 1000) {
		log_debug("listen: timeout sweep late by %" PRIu64 " ms; "
		    "closing nothing this time", now - l->swept_ms);
		idle = line = 0;
	}
	l->swept_ms = now;
	for (i = 0; idle > 0 && i < SC_NELEM(listen_streams); i++)
		while ((c = TAILQ_FIRST(&l->clients[listen_streams[i]])) !=
		    NULL && now - c->last_ms >= idle)
			listen_client_close(c, CLOSE_IDLE, now);
	while (line > 0 && (c = TAILQ_FIRST(&l->unfinished)) != NULL &&
	    now - c->line_ms >= line)
		listen_client_close(c, CLOSE_SLOW, now);
	if (!l->draining)
		listen_sweep_arm(l);
}


struct listen *
listen_new(struct daemon *d, char **cause)
{
	struct listen *l;
	size_t i;

	l = xcalloc(1, sizeof *l);
	l->d = d;
	l->udp_fd = -1;
	for (i = 0; i < SRC_N; i++)
		TAILQ_INIT(&l->clients[i]);
	TAILQ_INIT(&l->unfinished);
	TAILQ_INIT(&l->dead);
	l->per_source = nmap_new(d->hashkey);
	l->reap_ev = event_new(d->base, -1, 0, listen_reap_cb, l);
	l->sweep_ev = evtimer_new(d->base, listen_sweep_cb, l);
	if (l->reap_ev == NULL || l->sweep_ev == NULL) {
		*cause = xstrdup("cannot create listener events");
		listen_free(l);
		return NULL;
	}
	if (listen_sock_open(l, cause) != 0) {
		listen_free(l);
		return NULL;
	}
	listen_sweep_arm(l);
	return l;
}

void
listen_free(struct listen *l)
{
	struct client *c;
	size_t i;

	if (l == NULL)
		return;
	for (i = 0; i < SRC_N; i++)
		while ((c = TAILQ_FIRST(&l->clients[i])) != NULL) {
			TAILQ_REMOVE(&l->clients[i], c, entry);
			listen_client_free(c);
		}
	while ((c = TAILQ_FIRST(&l->dead)) != NULL) {
		TAILQ_REMOVE(&l->dead, c, entry);
		listen_client_free(c);
	}
	listen_sock_close(l);
	if (l->reap_ev != NULL)
		event_free(l->reap_ev);
	if (l->sweep_ev != NULL)
		event_free(l->sweep_ev);
	nmap_free(l->per_source);
	free(l);
}

/* Shutdown: apply what the kernel already holds for c (bounded). */
static void
listen_drain_client(struct client *c)
{
	struct evbuffer *in = bufferevent_get_input(c->bev);
	int fd = bufferevent_getfd(c->bev), n;
	size_t got;

	for (got = 0, n = 1; fd != -1 && got < LISTEN_DRAIN_MAX &&
	    c->state != CLIENT_DEAD; got += (size_t)n) {
		n = evbuffer_read(in, fd, 65536);
		if (n <= 0)
			break;
		listen_client_input(c, 0);
	}
	if (c->state != CLIENT_DEAD) {
		/* A last line without its newline counts only when the
		 * client has closed; otherwise it is unfinished and dropped
		 * (sockets are at-most-once). */
		listen_client_input(c, n == 0);
		listen_client_set_state(c, CLIENT_DEAD);
	}
}

/*
 * Shutdown: no new connections; what the kernel already holds for each
 * client (bounded) and for the UDP socket is applied; then every client
 * is closed. Called from the signal handler, not a client callback, so
 * clients are freed right here.
 */
void
listen_drain(struct listen *l)
{
	struct client *c;
	size_t i;

	l->draining = 1;
	listen_sock_accept(l, 0);
	event_del(l->sweep_ev);
	if (l->udp_ev != NULL) {
		event_del(l->udp_ev);
		listen_sock_udp_read(l, LISTEN_UDP_DRAIN);
	}
	for (i = 0; i < SC_NELEM(listen_streams); i++)
		while ((c = TAILQ_FIRST(&l->clients[listen_streams[i]])) !=
		    NULL)
			listen_drain_client(c);
	listen_reap_cb(-1, 0, l);
}

void
listen_metrics(struct listen *l, struct evbuffer *b)
{
	const enum source *stream = listen_streams;
	size_t i;
	int r;

	metrics_family(b, "stopcock_clients", "gauge",
	    "Connected stream clients.");
	for (i = 0; i < SC_NELEM(listen_streams); i++)
		evbuffer_add_printf(b, "stopcock_clients{source=\"%s\"} %u\n",
		    source_name(stream[i]), l->nby[stream[i]]);
	metrics_family(b, "stopcock_clients_accepted_total", "counter",
	    "Stream connections accepted.");
	for (i = 0; i < SC_NELEM(listen_streams); i++)
		evbuffer_add_printf(b, "stopcock_clients_accepted_total{source="
		    "\"%s\"} %" PRIu64 "\n", source_name(stream[i]),
		    l->accepted[stream[i]]);
	metrics_family(b, "stopcock_clients_refused_total", "counter",
	    "Connections closed at once: max_clients, or "
	    "max_clients_per_source from one source, reached.");
	for (r = 0; r < REFUSE_N; r++)
		evbuffer_add_printf(b, "stopcock_clients_refused_total{reason="
		    "\"%s\"} %" PRIu64 "\n", listen_refuse_names[r],
		    l->refused[r]);
	metrics_family(b, "stopcock_clients_cut_total", "counter",
	    "Clients cut off for garbage or an endless line.");
	for (i = 0; i < SC_NELEM(listen_streams); i++)
		for (r = 0; r < CUT_N; r++)
			evbuffer_add_printf(b, "stopcock_clients_cut_total{"
			    "source=\"%s\",reason=\"%s\"} %" PRIu64 "\n",
			    source_name(stream[i]), listen_cut_names[r],
			    l->cut[stream[i]][r]);
	metrics_family(b, "stopcock_clients_closed_total", "counter",
	    "Clients closed for silence (client_idle_timeout), a line "
	    "too slow to end (client_line_timeout), or evicted to make room "
	    "for another input at max_clients.");
	for (i = 0; i < SC_NELEM(listen_streams); i++)
		for (r = 0; r < CLOSE_N; r++)
			evbuffer_add_printf(b, "stopcock_clients_closed_total{"
			    "source=\"%s\",reason=\"%s\"} %" PRIu64 "\n",
			    source_name(stream[i]), listen_close_names[r],
			    l->closed[stream[i]][r]);
	metrics_counter(b, "stopcock_accept_backoffs_total", "Times accepting "
	    "paused for lack of file descriptors.", l->backoffs);
	metrics_counter(b, "stopcock_udp_datagrams_total",
	    "UDP datagrams received.", l->udp_datagrams);
}

/* "refused" is the sum over refused_by; "closed" beside "cut". */
json_t *
listen_json(struct listen *l)
{
	const enum source *stream = listen_streams;
	json_t *o = json_object(), *clients = json_object();
	json_t *accepted = json_object(), *cut = json_object(), *cs;
	json_t *closed = json_object(), *refused_by = json_object();
	uint64_t refused = 0;
	size_t i;
	int r;

	for (i = 0; i < SC_NELEM(listen_streams); i++) {
		const char *name = source_name(stream[i]);

		json_object_set_new(clients, name,
		    json_integer(l->nby[stream[i]]));
		json_object_set_new(accepted, name,
		    json_integer((json_int_t)l->accepted[stream[i]]));
		cs = json_object();
		for (r = 0; r < CUT_N; r++)
			json_object_set_new(cs, listen_cut_names[r],
			    json_integer((json_int_t)l->cut[stream[i]][r]));
		json_object_set_new(cut, name, cs);
		cs = json_object();
		for (r = 0; r < CLOSE_N; r++)
			json_object_set_new(cs, listen_close_names[r],
			    json_integer((json_int_t)l->closed[stream[i]][r]));
		json_object_set_new(closed, name, cs);
	}
	for (r = 0; r < REFUSE_N; r++) {
		refused += l->refused[r];
		json_object_set_new(refused_by, listen_refuse_names[r],
		    json_integer((json_int_t)l->refused[r]));
	}
	json_object_set_new(o, "clients", clients);
	json_object_set_new(o, "accepted", accepted);
	json_object_set_new(o, "cut", cut);
	json_object_set_new(o, "closed", closed);
	json_object_set_new(o, "refused", json_integer((json_int_t)refused));
	json_object_set_new(o, "refused_by", refused_by);
	json_object_set_new(o, "accept_backoffs",
	    json_integer((json_int_t)l->backoffs));
	json_object_set_new(o, "udp_datagrams",
	    json_integer((json_int_t)l->udp_datagrams));
	return o;
}
