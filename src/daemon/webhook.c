/*
 * webhook.c: signed webhook deliveries over libcurl's multi interface,
 * driven by the daemon's libevent loop, so no call here ever blocks on
 * the network. One receiver per [webhook NAME], plus an internal receiver
 * for the pause URL (pause.c posts through webhook_post). Each delivery
 * is spooled before it is attempted and deleted once the receiver
 * answers 2xx (webhook_spool.c: the queue, its files and its bound), so
 * an outage or a restart loses nothing; a spooled delivery is retried
 * until the receiver takes it.
 *
 * Signing follows the Standard Webhooks specification: the secret is
 * "whsec_" + base64 key bytes; webhook-signature is "v1," +
 * base64(HMAC-SHA256(key, id "." timestamp "." body)), made by sign.c,
 * the same code that verifies producers' batches. The webhook-id is
 * stable for one message across attempts, so receivers can deduplicate.
 *
 * Retries: timeouts, connection errors, 429 and 5xx are retried with
 * capped exponential backoff with full jitter (Brooker, "Exponential
 * backoff and jitter", AWS Architecture Blog, 2015); the backoff is per
 * receiver, and while a receiver is failing only one request probes it.
 * Once the backoff would wait longer than the probe interval (5 s unless
 * configured), the oldest delivery probes at that interval instead, and
 * the first answer sends the rest at once: a receiver that comes back is
 * reached within seconds, not after the backoff cap.
 * Any other answer (4xx, 3xx) is final: counted as failed and dropped.
 */
#include <sys/queue.h>
#include <sys/types.h>

#include <inttypes.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <curl/curl.h>
#include <openssl/rand.h>

#include "stopcock/log.h"
#include "stopcock/sign.h"
#include "webhook_int.h"

/*
 * Full jitter: uniform in [0, min(cap, base * 2^(failures - 1))]; once
 * that ceiling passes the probe interval, the probe interval itself.
 */
static double
webhook_backoff(const struct receiver *r)
{
	double ceiling;
	uint32_t u, failures = r->failing;

	ceiling = WEBHOOK_BACKOFF_BASE * ldexp(1.0,
	    (int)(failures > 20 ? 20 : failures) - 1);
	if (ceiling > r->backoff_cap)
		ceiling = r->backoff_cap;
	if (ceiling > r->probe)
		return r->probe;
	if (RAND_bytes((unsigned char *)&u, sizeof u) != 1)
		u = (uint32_t)random();
	return ceiling * ((double)u / 4294967296.0);
}

void
webhook_delivery_free(struct delivery *dl)
{
	if (dl->easy != NULL) {
		curl_multi_remove_handle(dl->rcv->w->multi, dl->easy);
		curl_easy_cleanup(dl->easy);
	}
	curl_slist_free_all(dl->headers);
	dl->rcv->spool_used -= dl->len;
	free(dl->id);
	free(dl->body);
	free(dl->path);
	free(dl->experiment);
	free(dl);
}

static size_t
webhook_reply_cb(char *ptr, size_t size, size_t nmemb, void *arg)
{
	struct delivery *dl = arg;
	size_t n = size * nmemb, room = WEBHOOK_REPLY_MAX - dl->replylen;

	if (room > n)
		room = n;
	memcpy(dl->reply + dl->replylen, ptr, room);
	dl->replylen += room;
	dl->reply[dl->replylen] = '\0';
	return n;	/* the rest is read and discarded */
}

static int
webhook_start(struct receiver *r, struct delivery *dl, char **cause)
{
	struct webhook *w = r->w;
	char sig[128], *h;
	long long ts = (long long)daemon_now();
	CURLMcode mc;
	CURL *e;

	dl->error[0] = '\0';
	dl->replylen = 0;
	dl->reply[0] = '\0';
	curl_slist_free_all(dl->headers);
	dl->headers = NULL;

	xasprintf(&h, "webhook-id: %s", dl->id);
	dl->headers = curl_slist_append(dl->headers, h);
	free(h);
	xasprintf(&h, "webhook-timestamp: %lld", ts);
	dl->headers = curl_slist_append(dl->headers, h);
	free(h);
	if (r->sign) {
		if (sign_make(r->key, r->keylen, dl->id, strlen(dl->id), ts,
		    dl->body, dl->len, sig, sizeof sig) == -1) {
			*cause = xstrdup("signing failed");
			return -1;
		}
		xasprintf(&h, "webhook-signature: %s", sig);
		dl->headers = curl_slist_append(dl->headers, h);
		free(h);
	}
	dl->headers = curl_slist_append(dl->headers,
	    "Content-Type: application/json");
	dl->headers = curl_slist_append(dl->headers, "Expect:");
	if (dl->headers == NULL) {
		*cause = xstrdup("curl_slist_append failed");
		return -1;
	}

	if ((e = curl_easy_init()) == NULL) {
		*cause = xstrdup("curl_easy_init failed");
		return -1;
	}
	if (curl_easy_setopt(e, CURLOPT_URL, r->url) != CURLE_OK ||
	    curl_easy_setopt(e, CURLOPT_PROTOCOLS_STR, "http,https") !=
	    CURLE_OK ||
	    curl_easy_setopt(e, CURLOPT_NOSIGNAL, 1L) != CURLE_OK ||
	    curl_easy_setopt(e, CURLOPT_POST, 1L) != CURLE_OK ||
	    curl_easy_setopt(e, CURLOPT_POSTFIELDS, dl->body) != CURLE_OK ||
	    curl_easy_setopt(e, CURLOPT_POSTFIELDSIZE_LARGE,
	    (curl_off_t)dl->len) != CURLE_OK ||
	    curl_easy_setopt(e, CURLOPT_HTTPHEADER, dl->headers) != CURLE_OK ||
	    curl_easy_setopt(e, CURLOPT_USERAGENT, "stopcockd") != CURLE_OK ||
	    curl_easy_setopt(e, CURLOPT_TIMEOUT_MS,
	    (long)(r->timeout * 1000)) != CURLE_OK ||
	    curl_easy_setopt(e, CURLOPT_WRITEFUNCTION, webhook_reply_cb) !=
	    CURLE_OK ||
	    curl_easy_setopt(e, CURLOPT_WRITEDATA, dl) != CURLE_OK ||
	    curl_easy_setopt(e, CURLOPT_ERRORBUFFER, dl->error) != CURLE_OK ||
	    curl_easy_setopt(e, CURLOPT_PRIVATE, dl) != CURLE_OK) {
		curl_easy_cleanup(e);
		*cause = xstrdup("curl_easy_setopt failed");
		return -1;
	}
	if ((mc = curl_multi_add_handle(w->multi, e)) != CURLM_OK) {
		curl_easy_cleanup(e);
		xasprintf(cause, "curl_multi_add_handle: %s",
		    curl_multi_strerror(mc));
		return -1;
	}
	dl->easy = e;
	dl->attempts++;
	return 0;
}

/* Try again later: the receiver backs off as a whole. */
static void
webhook_retry(struct receiver *r, struct delivery *dl, double retry_after)
{
	double delay, now = daemon_now();

	/* Only what is not on disk, or what a later post repeats, is given
	 * up: a spooled alert waits for its receiver however long it takes. */
	if ((dl->path == NULL || r->supersede) && r->max_attempts > 0 &&
	    dl->attempts >= r->max_attempts) {
		r->failed++;
		log_warnx("webhook: giving up receiver=%s id=%s attempts=%d",
		    r->name, dl->id, dl->attempts);
		webhook_spool_forget(dl);
		webhook_delivery_free(dl);
		return;
	}
	r->retries++;
	r->failing++;
	delay = webhook_backoff(r);
	if (retry_after > delay)
		delay = retry_after > r->backoff_cap ? r->backoff_cap :
		    retry_after;
	if (now + delay > r->next_try)
		r->next_try = now + delay;
	webhook_spool_insert(r, dl);
}

static void
webhook_done(struct webhook *w, CURL *e, CURLcode rc)
{
	struct delivery *dl = NULL;
	struct receiver *r;
	long status = 0;
	curl_off_t after = -1;

	if (curl_easy_getinfo(e, CURLINFO_PRIVATE, (char **)&dl) != CURLE_OK ||
	    dl == NULL) {
		curl_multi_remove_handle(w->multi, e);
		curl_easy_cleanup(e);
		return;
	}
	r = dl->rcv;
	(void)curl_easy_getinfo(e, CURLINFO_RESPONSE_CODE, &status);
	(void)curl_easy_getinfo(e, CURLINFO_RETRY_AFTER, &after);
	curl_multi_remove_handle(w->multi, e);
	curl_easy_cleanup(e);
	dl->easy = NULL;
	TAILQ_REMOVE(&r->inflight, dl, entry);
	r->ninflight--;

	if (rc == CURLE_OK && status >= 200 && status <= 299) {
		r->sent++;
		r->failing = 0;
		r->next_try = 0;
		log_debug("webhook: sent receiver=%s id=%s status=%ld "
		    "attempts=%d", r->name, dl->id, status, dl->attempts);
		webhook_spool_forget(dl);
		webhook_delivery_free(dl);
	} else if (rc != CURLE_OK) {
		log_warnx("webhook: attempt failed receiver=%s id=%s "
		    "attempt=%d error=\"%s\"", r->name, dl->id, dl->attempts,
		    dl->error[0] != '\0' ? dl->error : curl_easy_strerror(rc));
		if (rc == CURLE_URL_MALFORMAT ||
		    rc == CURLE_UNSUPPORTED_PROTOCOL) {
			r->failed++;
			webhook_spool_forget(dl);
			webhook_delivery_free(dl);
		} else
			webhook_retry(r, dl, 0);
	} else if (status == 429 || status >= 500) {
		log_warnx("webhook: attempt failed receiver=%s id=%s "
		    "attempt=%d status=%ld", r->name, dl->id, dl->attempts,
		    status);
		webhook_retry(r, dl, after > 0 ? (double)after : 0);
	} else {
		/* The receiver answered and refused: retrying cannot help. */
		r->failed++;
		r->failing = 0;
		r->next_try = 0;
		log_warnx("webhook: refused receiver=%s id=%s status=%ld "
		    "reply=\"%.80s\"", r->name, dl->id, status, dl->reply);
		webhook_spool_forget(dl);
		webhook_delivery_free(dl);
	}
	webhook_kick(r);
}

static void
webhook_check(struct webhook *w)
{
	CURLMsg *m;
	int left;

	while ((m = curl_multi_info_read(w->multi, &left)) != NULL)
		if (m->msg == CURLMSG_DONE)
			webhook_done(w, m->easy_handle, m->data.result);
}

static void
webhook_socket_event(evutil_socket_t fd, short what, void *arg)
{
	struct webhook *w = arg;
	int action = 0, running;
	CURLMcode mc;

	if (what & EV_READ)
		action |= CURL_CSELECT_IN;
	if (what & EV_WRITE)
		action |= CURL_CSELECT_OUT;
	mc = curl_multi_socket_action(w->multi, fd, action, &running);
	if (mc != CURLM_OK)
		log_warnx("webhook: curl_multi_socket_action: %s",
		    curl_multi_strerror(mc));
	webhook_check(w);
}

static void
webhook_timer_event(evutil_socket_t fd, short what, void *arg)
{
	struct webhook *w = arg;
	int running;
	CURLMcode mc;

	mc = curl_multi_socket_action(w->multi, CURL_SOCKET_TIMEOUT, 0,
	    &running);
	if (mc != CURLM_OK)
		log_warnx("webhook: curl_multi_socket_action: %s",
		    curl_multi_strerror(mc));
	webhook_check(w);
}

/* CURLMOPT_SOCKETFUNCTION: one persistent event per socket curl uses. */
static int
webhook_socket_cb(CURL *e, curl_socket_t s, int what, void *arg,
    void *socketp)
{
	struct webhook *w = arg;
	struct event *ev = socketp;
	short kind;

	if (what == CURL_POLL_REMOVE) {
		if (ev != NULL) {
			event_free(ev);
			curl_multi_assign(w->multi, s, NULL);
		}
		return 0;
	}
	kind = EV_PERSIST;
	if (what & CURL_POLL_IN)
		kind |= EV_READ;
	if (what & CURL_POLL_OUT)
		kind |= EV_WRITE;
	if (ev != NULL) {
		event_del(ev);
		if (event_assign(ev, w->d->base, s, kind, webhook_socket_event,
		    w) == -1)
			return -1;
	} else {
		ev = event_new(w->d->base, s, kind, webhook_socket_event, w);
		if (ev == NULL)
			return -1;
		if (curl_multi_assign(w->multi, s, ev) != CURLM_OK) {
			event_free(ev);
			return -1;
		}
	}
	return event_add(ev, NULL) == -1 ? -1 : 0;
}

/* CURLMOPT_TIMERFUNCTION: curl's one timeout becomes one loop timer. */
static int
webhook_timer_cb(CURLM *multi, long ms, void *arg)
{
	struct webhook *w = arg;
	struct timeval tv;

	if (ms < 0)
		return event_del(w->timer);
	tv.tv_sec = ms / 1000;
	tv.tv_usec = (ms % 1000) * 1000;
	return evtimer_add(w->timer, &tv);
}

static void
webhook_wake_event(evutil_socket_t fd, short what, void *arg)
{
	webhook_kick(arg);
}

/* Start what may start now; otherwise arm the wake timer. */
void
webhook_kick(struct receiver *r)
{
	struct delivery *dl;
	struct timeval tv;
	double now = daemon_now(), wait;
	char *cause = NULL;

	while ((dl = TAILQ_FIRST(&r->waiting)) != NULL) {
		if (now < r->next_try) {
			wait = r->next_try - now;
			tv.tv_sec = (time_t)wait;
			tv.tv_usec = (suseconds_t)((wait - (double)tv.tv_sec) *
			    1e6);
			evtimer_add(r->wake, &tv);
			return;
		}
		if (r->ninflight >= (r->failing > 0 ? 1 : WEBHOOK_INFLIGHT_MAX))
			return;
		TAILQ_REMOVE(&r->waiting, dl, entry);
		r->nwaiting--;
		if (webhook_start(r, dl, &cause) == -1) {
			log_warnx("webhook: cannot start receiver=%s id=%s: %s",
			    r->name, dl->id, cause);
			free(cause);
			cause = NULL;
			dl->attempts++;
			webhook_retry(r, dl, WEBHOOK_BACKOFF_BASE);
			continue;
		}
		TAILQ_INSERT_TAIL(&r->inflight, dl, entry);
		r->ninflight++;
	}
}


/* cw: a configured receiver's tunables; NULL for the internal ones. */
static int
webhook_add(struct webhook *w, const char *name, const char *url,
    const char *secret, double timeout, int max_attempts, uint32_t queue,
    int internal, uint32_t kinds, const struct conf_webhook *cw,
    char **cause)
{
	struct daemon *d = w->d;
	struct receiver *r;
	char *why = NULL;

	if (strcmp(name, ".") == 0 || strcmp(name, "..") == 0 ||
	    strchr(name, '/') != NULL) {
		xasprintf(cause, "webhook %s: bad receiver name", name);
		return -1;
	}
	if (url == NULL || *url == '\0') {
		xasprintf(cause, "webhook %s: no url", name);
		return -1;
	}
	r = xcalloc(1, sizeof *r);
	r->w = w;
	TAILQ_INIT(&r->waiting);
	TAILQ_INIT(&r->inflight);
	if (secret != NULL && *secret != '\0') {
		if (sign_secret_key(secret, r->key, &r->keylen, &why) ==
		    -1) {
			xasprintf(cause, "webhook %s: %s", name, why);
			free(why);
			free(r);
			return -1;
		}
		r->sign = 1;
	}
	r->name = xstrdup(name);
	r->url = xstrdup(url);
	r->internal = internal;
	r->kinds = kinds;
	r->timeout = timeout > 0 ? timeout : WEBHOOK_TIMEOUT;
	r->max_attempts = max_attempts;
	r->queue_max = queue > 0 ? queue : WEBHOOK_QUEUE;
	r->backoff_cap = cw != NULL && cw->backoff_cap > 0 ? cw->backoff_cap :
	    WEBHOOK_BACKOFF_CAP;
	r->probe = cw != NULL && cw->probe > 0 ? cw->probe : WEBHOOK_PROBE;
	r->spool_max = cw != NULL && cw->spool_bytes > 0 ? cw->spool_bytes :
	    WEBHOOK_SPOOL_BYTES;
	/* Alertmanager's next refresh carries every alert again. */
	r->supersede = strcmp(name, WEBHOOK_ALERTMANAGER) == 0 && internal;
	if ((r->wake = evtimer_new(d->base, webhook_wake_event, r)) == NULL)
		fatalx("webhook: evtimer_new failed");
	w->rcv = xreallocarray(w->rcv, (size_t)w->nrcv + 1, sizeof *w->rcv);
	w->rcv[w->nrcv++] = r;

	if (d->conf->state_dir != NULL) {
		xasprintf(&r->spool, "%s/spool/%s", d->conf->state_dir, name);
		if (durable_mkdirs(r->spool, 0700, cause) == -1)
			return -1;
		webhook_spool_load(r);
	} else
		log_warnx("webhook: no state_dir, receiver=%s is not spooled",
		    name);
	if (!r->sign && !internal)
		log_warnx("webhook: receiver=%s has no secret, requests are "
		    "not signed", name);
	return 0;
}

/* Alertmanager: unsigned, its API's path, a few attempts each (the
 * next refresh carries the same alert again). */
static int
webhook_alertmanager(struct webhook *w, const struct conf *c, char **cause)
{
	char *base, *url;
	size_t len;
	int rc;

	base = xstrdup(c->am_url);
	len = strlen(base);
	while (len > 0 && base[len - 1] == '/')
		base[--len] = '\0';
	xasprintf(&url, "%s/api/v2/alerts", base);
	free(base);
	rc = webhook_add(w, WEBHOOK_ALERTMANAGER, url, NULL, 0, 4, 1000, 1, 0,
	    NULL, cause);
	free(url);
	return rc;
}

struct webhook *
webhook_new(struct daemon *d, char **cause)
{
	const struct conf *c = d->conf;
	const curl_version_info_data *vi;
	struct webhook *w;
	int i;

	if (curl_global_init(CURL_GLOBAL_DEFAULT) != CURLE_OK) {
		*cause = xstrdup("curl_global_init failed");
		return NULL;
	}
	vi = curl_version_info(CURLVERSION_NOW);
	if (vi == NULL || !(vi->features & CURL_VERSION_SSL))
		log_warnx("webhook: libcurl without TLS, https URLs fail");
	w = xcalloc(1, sizeof *w);
	w->d = d;
	w->seq = 1;
	if ((w->multi = curl_multi_init()) == NULL) {
		*cause = xstrdup("curl_multi_init failed");
		free(w);
		curl_global_cleanup();
		return NULL;
	}
	if ((w->timer = evtimer_new(d->base, webhook_timer_event, w)) == NULL)
		fatalx("webhook: evtimer_new failed");
	if (curl_multi_setopt(w->multi, CURLMOPT_SOCKETFUNCTION,
	    webhook_socket_cb) != CURLM_OK ||
	    curl_multi_setopt(w->multi, CURLMOPT_SOCKETDATA, w) != CURLM_OK ||
	    curl_multi_setopt(w->multi, CURLMOPT_TIMERFUNCTION,
	    webhook_timer_cb) != CURLM_OK ||
	    curl_multi_setopt(w->multi, CURLMOPT_TIMERDATA, w) != CURLM_OK) {
		*cause = xstrdup("curl_multi_setopt failed");
		webhook_free(w);
		return NULL;
	}
	for (i = 0; i < c->nwebhooks; i++) {
		const struct conf_webhook *cw = &c->webhooks[i];

		if (webhook_add(w, cw->name, cw->url, cw->secret, cw->timeout,
		    cw->max_attempts, cw->queue, 0, cw->kinds, cw, cause) ==
		    -1) {
			webhook_free(w);
			return NULL;
		}
	}
	if (c->pause_url != NULL && *c->pause_url != '\0' &&
	    webhook_add(w, WEBHOOK_PAUSE, c->pause_url, c->pause_secret, 0, 0,
	    0, 1, 0, NULL, cause) == -1) {
		webhook_free(w);
		return NULL;
	}
	if (c->am_url != NULL && webhook_alertmanager(w, c, cause) == -1) {
		webhook_free(w);
		return NULL;
	}
	for (i = 0; i < w->nrcv; i++)
		webhook_kick(w->rcv[i]);
	return w;
}

void
webhook_free(struct webhook *w)
{
	struct receiver *r;
	struct delivery *dl;
	int i;

	if (w == NULL)
		return;
	/* Spool files stay: what was not sent goes out after a restart. */
	for (i = 0; i < w->nrcv; i++) {
		r = w->rcv[i];
		while ((dl = TAILQ_FIRST(&r->inflight)) != NULL) {
			TAILQ_REMOVE(&r->inflight, dl, entry);
			webhook_delivery_free(dl);
		}
		while ((dl = TAILQ_FIRST(&r->waiting)) != NULL) {
			TAILQ_REMOVE(&r->waiting, dl, entry);
			webhook_delivery_free(dl);
		}
		if (r->wake != NULL)
			event_free(r->wake);
		free(r->name);
		free(r->url);
		free(r->spool);
		OPENSSL_cleanse(r->key, sizeof r->key);
		free(r);
	}
	free(w->rcv);
	if (w->multi != NULL)
		curl_multi_cleanup(w->multi);
	if (w->timer != NULL)
		event_free(w->timer);
	free(w);
	curl_global_cleanup();
}

/* An alert of severity info is the only kind a full spool may drop. */
static int
webhook_info(json_t *body)
{
	const char *sev = json_string_value(json_object_get(body, "severity"));

	return sev != NULL && strcmp(sev, "info") == 0;
}

static char *
webhook_dump(json_t *body, size_t *len)
{
	char *text;

	if ((text = json_dumps(body, JSON_COMPACT)) == NULL) {
		log_warnx("webhook: cannot serialize body");
		return NULL;
	}
	*len = strlen(text);
	return text;
}

void
webhook_send(struct webhook *w, uint32_t need, const char *id, json_t *body)
{
	char *text;
	size_t len;
	int i;

	if (w == NULL || (text = webhook_dump(body, &len)) == NULL)
		return;
	for (i = 0; i < w->nrcv; i++)
		if (!w->rcv[i]->internal && (w->rcv[i]->kinds & need) == need)
			webhook_spool_queue(w->rcv[i], id, text, len,
			    webhook_info(body));
	free(text);
}

int
webhook_post(struct webhook *w, const char *receiver, const char *id,
    json_t *body)
{
	char *text;
	size_t len;
	int i;

	if (w == NULL)
		return -1;
	for (i = 0; i < w->nrcv; i++) {
		if (strcmp(w->rcv[i]->name, receiver) != 0)
			continue;
		if ((text = webhook_dump(body, &len)) == NULL)
			return -1;
		webhook_spool_queue(w->rcv[i], id, text, len, webhook_info(body));
		free(text);
		return 0;
	}
	return -1;
}

void
webhook_metrics(struct webhook *w, struct evbuffer *b)
{
	static const struct {
		const char	*name;
		const char	*type;
		const char	*help;
	} m[] = {
		{ "stopcock_webhook_sent_total", "counter",
		  "Webhook deliveries answered with 2xx." },
		{ "stopcock_webhook_failed_total", "counter",
		  "Webhook deliveries given up (4xx, or attempts exhausted "
		  "where nothing is spooled)." },
		{ "stopcock_webhook_dropped_total", "counter",
		  "Info alerts dropped because the spool was full." },
		{ "stopcock_webhook_retries_total", "counter",
		  "Webhook attempts that failed and were scheduled again." },
		{ "stopcock_webhook_retrying", "gauge",
		  "Webhook deliveries waiting for a retry." },
		{ "stopcock_webhook_queued", "gauge",
		  "Webhook deliveries not yet settled (spooled)." },
		{ "stopcock_webhook_spool_errors_total", "counter",
		  "Webhook spool files that could not be written or read." },
		{ "stopcock_webhook_spool_bytes", "gauge",
		  "Bytes of webhook bodies held (the spool_bytes bound)." },
		{ "stopcock_webhook_overfull_total", "counter",
		  "Alerts kept beyond a full spool (never dropped: not info)." },
	};
	struct receiver *r;
	struct delivery *dl;
	uint64_t v;
	size_t k;
	int i;

	if (w == NULL || w->nrcv == 0)
		return;
	for (k = 0; k < SC_NELEM(m); k++) {
		metrics_family(b, m[k].name, m[k].type, m[k].help);
		for (i = 0; i < w->nrcv; i++) {
			r = w->rcv[i];
			switch (k) {
			case 0: v = r->sent; break;
			case 1: v = r->failed; break;
			case 2: v = r->dropped; break;
			case 3: v = r->retries; break;
			case 4:
				v = 0;
				TAILQ_FOREACH(dl, &r->waiting, entry)
					if (dl->attempts > 0)
						v++;
				break;
			case 5: v = r->nwaiting + r->ninflight; break;
			case 6: v = r->spool_errors; break;
			case 7: v = r->spool_used; break;
			default: v = r->overfull; break;
			}
			evbuffer_add_printf(b, "%s{", m[k].name);
			metrics_label(b, "receiver", r->name, 1);
			evbuffer_add_printf(b, "} %" PRIu64 "\n", v);
		}
	}
}

/*
 * What a Kafka partition carries to its next owner: every delivery not
 * yet answered whose body is about an experiment mine() accepts, as
 * [{"receiver", "id", "body" (text), "info"}]. Internal receivers (the
 * pause URL) are included: a pause is an alert too.
 */
json_t *
webhook_pending(struct webhook *w, int (*mine)(void *, const char *),
    void *arg)
{
	json_t *out = json_array();
	struct receiver *r;
	struct delivery *dl;
	struct deliveries *lists[2];
	int i, l;

	if (w == NULL)
		return out;
	for (i = 0; i < w->nrcv; i++) {
		r = w->rcv[i];
		lists[0] = &r->inflight;
		lists[1] = &r->waiting;
		for (l = 0; l < 2; l++)
			TAILQ_FOREACH(dl, lists[l], entry)
				if (dl->experiment != NULL &&
				    mine(arg, dl->experiment))
					json_array_append_new(out, json_pack(
					    "{s:s, s:s, s:s%, s:b}",
					    "receiver", r->name, "id", dl->id,
					    "body", dl->body, dl->len,
					    "info", dl->info));
	}
	return out;
}

static int
webhook_has(const struct receiver *r, const char *id)
{
	const struct delivery *dl;

	TAILQ_FOREACH(dl, &r->inflight, entry)
		if (strcmp(dl->id, id) == 0)
			return 1;
	TAILQ_FOREACH(dl, &r->waiting, entry)
		if (strcmp(dl->id, id) == 0)
			return 1;
	return 0;
}

/*
 * Queue (and spool) another daemon's webhook_pending here, with the
 * same webhook-ids, so the receivers can tell a repeat; a delivery this
 * daemon already holds by id is not queued twice. The number queued.
 */
size_t
webhook_adopt(struct webhook *w, const json_t *pending)
{
	const json_t *o;
	const char *name, *id, *body;
	size_t i, len, n = 0;
	int info, k;

	if (w == NULL)
		return 0;
	json_array_foreach(pending, i, o) {
		info = 0;
		if (json_unpack((json_t *)o, "{s:s, s:s, s:s%, s?b}",
		    "receiver", &name, "id", &id, "body", &body, &len, "info",
		    &info) != 0 || strlen(id) == 0 || strlen(id) > 128 ||
		    len > WEBHOOK_SPOOL_MAX) {
			log_warnx("webhook: a carried delivery is malformed; "
			    "skipped");
			continue;
		}
		for (k = 0; k < w->nrcv && strcmp(w->rcv[k]->name, name) != 0;
		    k++)
			;
		if (k == w->nrcv) {
			log_warnx("webhook: a carried delivery is for receiver "
			    "%s, not configured here; not sent id=%s", name,
			    id);
			continue;
		}
		if (webhook_has(w->rcv[k], id))
			continue;
		webhook_spool_queue(w->rcv[k], id, body, len, info);
		n++;
	}
	return n;
}
