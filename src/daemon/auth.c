/*
 * auth.c: producers and signed batches. Each [producer NAME] of the
 * configuration becomes a frame_producer (frame.c) holding its secrets
 * and the ids it used recently. An input that requires signatures
 * (tcp_signed, udp_signed, unix_signed, [redis] signed, [kafka] signed)
 * hands every batch here: listen.c parses frames off the stream or the
 * datagram, redis_in.c and kafka_in.c pass the fields or headers beside
 * the records. A batch is verified whole; an accepted one goes to
 * ingest as authenticated records, a refused one is counted by input and
 * reason and logged (a few per input and minute), and the batches
 * around it are untouched.
 *
 * It also says which records auto-pause may act on: a record is trusted
 * when it came in a verified batch, or from an input the configuration
 * trusts (auth_trusted). Every applied record is counted by its source:
 * its producer when signed, its input when not; the label sets are the
 * configured producers and the inputs, so they stay bounded whatever a
 * peer sends.
 *
 * The replay floors (frame_producer_floor) and the counters are kept in
 * the checkpoint, so a restart neither forgets which batches it took nor
 * reads its tallies as new.
 */
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <openssl/rand.h>

#include "stopcock/frame.h"
#include "stopcock/log.h"
#include "daemon.h"

#define AUTH_LOG_PER_MINUTE 5	/* refusals logged per input */

static const char *const auth_reason_names[AUTH_NREASON] = {
	[AUTH_BAD_SIGNATURE] = "bad_signature",
	[AUTH_UNKNOWN_PRODUCER] = "unknown_producer",
	[AUTH_STALE] = "stale_timestamp",
	[AUTH_REPLAYED] = "replayed",
	[AUTH_MALFORMED] = "malformed_frame",
	[AUTH_UNSIGNED] = "unsigned",
};

struct auth_producer {
	struct frame_producer	*fp;
	uint64_t		 batches;	/* accepted */
	uint64_t		 records;	/* applied from them */
};

struct auth_log {
	double		 window;
	unsigned	 logged;
	uint64_t	 suppressed;
};

struct auth {
	struct daemon		*d;
	uint8_t			 hashkey[16];
	struct auth_producer	 prod[CONF_PRODUCERS_MAX];
	int			 nprod;
	uint64_t		 refused[SRC_N][AUTH_NREASON];
	struct auth_log		 log[SRC_N];
};

const char *
auth_reason(enum auth_reason r)
{
	return r < AUTH_NREASON ? auth_reason_names[r] : "malformed_frame";
}

int
auth_signed(const struct conf *c, enum source src)
{
	switch (src) {
	case SRC_TCP:
		return c->tcp_signed;
	case SRC_UDP:
		return c->udp_signed;
	case SRC_UNIX:
		return c->unix_signed;
	case SRC_REDIS:
		return c->redis_signed;
	case SRC_KAFKA:
		return c->kafka_signed;
	default:
		return 0;
	}
}

int
auth_trusted(const struct conf *c, enum source src)
{
	if (auth_signed(c, src))
		return 1;
	switch (src) {
	case SRC_TCP:
		return c->tcp_trusted;
	case SRC_UDP:
		return c->udp_trusted;
	case SRC_UNIX:
		return c->unix_trusted;
	case SRC_REDIS:
		return c->redis_trusted;
	case SRC_KAFKA:
		return c->kafka_trusted;
	default:
		return 1;	/* the HTTP API: bearer token */
	}
}

static int
auth_add_key_cb(void *arg, const char *secret, char **why)
{
	return frame_producer_add_key(arg, secret, why);
}

/* Load the secrets of cp into fp (which has none yet). */
static int
auth_keys(struct frame_producer *fp, const struct conf_producer *cp,
    char **cause)
{
	char *why = NULL;

	if ((cp->secret != NULL &&
	    frame_producer_add_key(fp, cp->secret, &why) != 0) ||
	    (cp->previous_secret != NULL &&
	    frame_producer_add_key(fp, cp->previous_secret, &why) != 0)) {
		xasprintf(cause, "[producer %s]: %s", cp->name, why);
		free(why);
		return -1;
	}
	if (cp->secret_file != NULL && conf_secret_file(cp->secret_file,
	    auth_add_key_cb, fp, &why) != 0) {
		xasprintf(cause, "[producer %s] %s", cp->name, why);
		free(why);
		return -1;
	}
	return 0;
}

static struct auth_producer *
auth_find(struct auth *a, const char *name)
{
	int i;

	/* fp is NULL for one auth_configure has taken over */
	for (i = 0; i < a->nprod; i++)
		if (a->prod[i].fp != NULL &&
		    strcmp(frame_producer_name(a->prod[i].fp), name) == 0)
			return &a->prod[i];
	return NULL;
}

/*
 * Build the producers of c. A producer that was there before keeps its
 * remembered ids, floor and counters (a reload must not reopen replays);
 * all or nothing: on error a is untouched.
 */
int
auth_configure(struct auth *a, const struct conf *c, char **cause)
{
	struct auth_producer next[CONF_PRODUCERS_MAX], *old;
	struct frame_producer *keys;
	int i, j, n = 0;

	for (i = 0; i < c->nproducers; i++) {
		keys = frame_producer_new(c->producers[i].name, a->hashkey);
		if (auth_keys(keys, &c->producers[i], cause) != 0) {
			frame_producer_free(keys);
			for (j = 0; j < n; j++)
				frame_producer_free(next[j].fp);
			return -1;
		}
		memset(&next[n], 0, sizeof next[n]);
		next[n++].fp = keys;
	}
	for (i = 0; i < n; i++) {
		old = auth_find(a, frame_producer_name(next[i].fp));
		if (old == NULL)
			continue;
		frame_producer_take_keys(old->fp, next[i].fp);
		frame_producer_free(next[i].fp);
		next[i] = *old;
		old->fp = NULL;
	}
	for (i = 0; i < a->nprod; i++)
		if (a->prod[i].fp != NULL) {
			log_info("auth: producer removed name=%s",
			    frame_producer_name(a->prod[i].fp));
			frame_producer_free(a->prod[i].fp);
		}
	memcpy(a->prod, next, sizeof next[0] * (size_t)n);
	a->nprod = n;
	return 0;
}

/*
 * Say at start which inputs cannot feed a pause: after an upgrade, an
 * unsigned Redis feed that used to pause experiments is refused for them
 * (untrusted_input), and the log should say why before anyone looks.
 */
static void
auth_log_inputs(const struct conf *c)
{
	static const enum source inputs[] = {
		SRC_TCP, SRC_UDP, SRC_UNIX, SRC_REDIS, SRC_KAFKA
	};
	const char *set[] = { c->tcp, c->udp, c->unix_path, c->redis_address,
	    c->kafka_brokers };
	size_t i;
	int g, pauses = 0;

	for (g = 0; g < c->nguardrails; g++)
		pauses |= c->guardrails[g].action == ACTION_PAUSE;
	for (i = 0; i < SC_NELEM(inputs); i++) {
		if (set[i] == NULL)
			continue;
		if (auth_signed(c, inputs[i]))
			log_info("auth: input source=%s takes signed batches "
			    "only", source_name(inputs[i]));
		else if (!auth_trusted(c, inputs[i]) && pauses)
			log_warnx("auth: input source=%s is unsigned and not "
			    "trusted: its records are refused for experiments "
			    "a guardrail may pause (untrusted_input)",
			    source_name(inputs[i]));
	}
}

struct auth *
auth_new(struct daemon *d, char **cause)
{
	struct auth *a;

	a = xcalloc(1, sizeof *a);
	a->d = d;
	if (RAND_bytes(a->hashkey, sizeof a->hashkey) != 1)
		fatalx("auth: no random bytes for the id hash key");
	if (auth_configure(a, d->conf, cause) != 0) {
		free(a);
		return NULL;
	}
	auth_log_inputs(d->conf);
	return a;
}

void
auth_free(struct auth *a)
{
	int i;

	if (a == NULL)
		return;
	for (i = 0; i < a->nprod; i++)
		frame_producer_free(a->prod[i].fp);
	free(a);
}

void
auth_refuse(struct daemon *d, enum source src, enum auth_reason why,
    const struct frame *f, size_t bytes)
{
	struct auth *a = d->auth;
	struct auth_log *lg;
	double now = daemon_now();

	if (a == NULL || src >= SRC_N || why >= AUTH_NREASON)
		return;
	a->refused[src][why]++;
	lg = &a->log[src];
	if (now - lg->window >= 60) {
		if (lg->suppressed > 0)
			log_warnx("auth: %" PRIu64 " more refused batches not "
			    "logged source=%s", lg->suppressed,
			    source_name(src));
		lg->window = now;
		lg->logged = 0;
		lg->suppressed = 0;
	}
	if (lg->logged >= AUTH_LOG_PER_MINUTE) {
		lg->suppressed++;
		return;
	}
	lg->logged++;
	/* producer and id are checked names, safe to log; never the
	 * signature */
	if (f != NULL && f->producer[0] != '\0')
		log_warnx("auth: refused batch source=%s reason=%s producer=%s "
		    "id=%s ts=%lld bytes=%zu", source_name(src),
		    auth_reason(why), f->producer, f->id, f->ts, bytes);
	else
		log_warnx("auth: refused batch source=%s reason=%s bytes=%zu",
		    source_name(src), auth_reason(why), bytes);
}

int
auth_batch(struct daemon *d, enum source src, const struct frame *f,
    const char *body)
{
	struct auth *a = d->auth;
	struct auth_producer *p;
	enum frame_verdict v;

	if (a == NULL || (p = auth_find(a, f->producer)) == NULL) {
		auth_refuse(d, src, AUTH_UNKNOWN_PRODUCER, f, f->body_len);
		return -1;
	}
	v = frame_check(p->fp, f, body, daemon_now(),
	    d->conf->signature_tolerance);
	switch (v) {
	case FRAME_ACCEPT:
		break;
	case FRAME_STALE:
		auth_refuse(d, src, AUTH_STALE, f, f->body_len);
		return -1;
	case FRAME_REPLAYED:
		auth_refuse(d, src, AUTH_REPLAYED, f, f->body_len);
		return -1;
	default:
		auth_refuse(d, src, AUTH_BAD_SIGNATURE, f, f->body_len);
		return -1;
	}
	p->batches++;
	p->records += ingest_lines_signed(d, src, body, f->body_len);
	return 0;
}

int
auth_fields(struct daemon *d, enum source src, const char *producer,
    size_t plen, const char *id, size_t idlen, const char *ts, size_t tslen,
    const char *sig, size_t siglen, const char *body, size_t len)
{
	struct frame f;

	if (producer == NULL && id == NULL && ts == NULL && sig == NULL) {
		auth_refuse(d, src, AUTH_UNSIGNED, NULL, len);
		return -1;
	}
	memset(&f, 0, sizeof f);
	if (producer == NULL || id == NULL || ts == NULL || sig == NULL ||
	    frame_fields(producer, plen, id, idlen, ts, tslen, sig, siglen,
	    len, &f) != FRAME_OK) {
		auth_refuse(d, src, AUTH_MALFORMED, NULL, len);
		return -1;
	}
	return auth_batch(d, src, &f, body);
}

int
auth_datagram(struct daemon *d, enum source src, const char *p, size_t len)
{
	struct frame f;
	enum frame_status st;

	if (!frame_is_header(p, len)) {
		auth_refuse(d, src, AUTH_UNSIGNED, NULL, len);
		return -1;
	}
	st = frame_parse(p, len, &f);
	/* one datagram, one batch: nothing missing, nothing after it */
	if (st != FRAME_OK || f.header_len + f.body_len != len) {
		auth_refuse(d, src, AUTH_MALFORMED, st == FRAME_OK ? &f : NULL,
		    len);
		return -1;
	}
	return auth_batch(d, src, &f, p + f.header_len);
}

void
auth_metrics(struct daemon *d, struct evbuffer *b)
{
	struct auth *a = d->auth;
	struct ingest_counters *c = ingest_counters(d);
	int s, r, i;

	if (a == NULL)
		return;
	metrics_family(b, "stopcock_batches_refused_total", "counter",
	    "Signed-input batches refused whole, by input and reason.");
	for (s = 0; s < SRC_N; s++) {
		if (s == SRC_HTTP)
			continue;	/* no batches: the API has its token */
		for (r = 0; r < AUTH_NREASON; r++)
			evbuffer_add_printf(b, "stopcock_batches_refused_total"
			    "{source=\"%s\",reason=\"%s\"} %" PRIu64 "\n",
			    source_name(s), auth_reason(r), a->refused[s][r]);
	}
	metrics_family(b, "stopcock_batches_total", "counter",
	    "Signed batches accepted, by producer.");
	for (i = 0; i < a->nprod; i++) {
		evbuffer_add_printf(b, "stopcock_batches_total{");
		metrics_label(b, "producer", frame_producer_name(a->prod[i].fp),
		    1);
		evbuffer_add_printf(b, "} %" PRIu64 "\n", a->prod[i].batches);
	}
	metrics_family(b, "stopcock_source_records_total", "counter",
	    "Records applied by source: a producer's signed batches, or an "
	    "input's unsigned records.");
	for (i = 0; i < a->nprod; i++) {
		evbuffer_add_printf(b, "stopcock_source_records_total{");
		metrics_label(b, "producer", frame_producer_name(a->prod[i].fp),
		    1);
		evbuffer_add_printf(b, "} %" PRIu64 "\n", a->prod[i].records);
	}
	for (s = 0; s < SRC_N; s++)
		evbuffer_add_printf(b, "stopcock_source_records_total{input="
		    "\"%s\"} %" PRIu64 "\n", source_name(s),
		    c->unsigned_records[s]);
	/* gauges, not labels of the counter: a reload may change them */
	metrics_family(b, "stopcock_input_signed", "gauge",
	    "1 when the input takes signed batches only.");
	for (s = 0; s < SRC_N; s++)
		evbuffer_add_printf(b, "stopcock_input_signed{input=\"%s\"} "
		    "%d\n", source_name(s), auth_signed(d->conf, s));
	metrics_family(b, "stopcock_input_trusted", "gauge",
	    "1 when auto-pause may act on the input's records.");
	for (s = 0; s < SRC_N; s++)
		evbuffer_add_printf(b, "stopcock_input_trusted{input=\"%s\"} "
		    "%d\n", source_name(s), auth_trusted(d->conf, s));
}

/*
 * {"producers": {"NAME": {"batches": N, "records": N, "floor": TS}},
 *  "unsigned": {"tcp": {"records": N, "trusted": bool}, ...},
 *  "refused": {"tcp": {"bad_signature": N, ...}, ...}}; zero reasons
 * are left out of "refused".
 */
json_t *
auth_json(struct daemon *d)
{
	struct auth *a = d->auth;
	struct ingest_counters *c = ingest_counters(d);
	json_t *o = json_object(), *prods = json_object(), *uns = json_object();
	json_t *ref = json_object(), *rs;
	int i, s, r;

	for (i = 0; a != NULL && i < a->nprod; i++)
		json_object_set_new(prods, frame_producer_name(a->prod[i].fp),
		    json_pack("{s:I, s:I, s:I}", "batches",
		    (json_int_t)a->prod[i].batches, "records",
		    (json_int_t)a->prod[i].records, "floor",
		    (json_int_t)frame_producer_floor(a->prod[i].fp)));
	for (s = 0; s < SRC_N; s++) {
		json_object_set_new(uns, source_name(s), json_pack(
		    "{s:I, s:b, s:b}", "records",
		    (json_int_t)c->unsigned_records[s], "trusted",
		    auth_trusted(d->conf, s), "signed",
		    auth_signed(d->conf, s)));
		rs = json_object();
		for (r = 0; a != NULL && r < AUTH_NREASON; r++)
			if (a->refused[s][r] != 0)
				json_object_set_new(rs, auth_reason(r),
				    json_integer((json_int_t)a->refused[s][r]));
		json_object_set_new(ref, source_name(s), rs);
	}
	json_object_set_new(o, "producers", prods);
	json_object_set_new(o, "unsigned", uns);
	json_object_set_new(o, "refused", ref);
	return o;
}

static uint64_t
auth_get(const json_t *o, const char *key)
{
	json_t *v = json_object_get(o, key);

	if (!json_is_integer(v) || json_integer_value(v) < 0)
		return 0;
	return (uint64_t)json_integer_value(v);
}

/* Counters restore as informative; floors matter (replays). */
void
auth_restore(struct daemon *d, const json_t *o)
{
	struct auth *a = d->auth;
	struct ingest_counters *c = ingest_counters(d);
	json_t *prods, *p, *uns, *ref, *v;
	int i, s, r;

	if (a == NULL || !json_is_object(o))
		return;
	prods = json_object_get(o, "producers");
	for (i = 0; i < a->nprod; i++) {
		p = json_object_get(prods, frame_producer_name(a->prod[i].fp));
		if (!json_is_object(p))
			continue;
		a->prod[i].batches = auth_get(p, "batches");
		a->prod[i].records = auth_get(p, "records");
		v = json_object_get(p, "floor");
		if (json_is_integer(v))
			frame_producer_set_floor(a->prod[i].fp,
			    (long long)json_integer_value(v));
	}
	uns = json_object_get(o, "unsigned");
	ref = json_object_get(o, "refused");
	for (s = 0; s < SRC_N; s++) {
		c->unsigned_records[s] = auth_get(json_object_get(uns,
		    source_name(s)), "records");
		for (r = 0; r < AUTH_NREASON; r++)
			a->refused[s][r] = auth_get(json_object_get(ref,
			    source_name(s)), auth_reason(r));
	}
}
