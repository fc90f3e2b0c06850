/*
 * kafka_state.c: one input partition's state, the exactly-once half of
 * the Kafka input (kafka_in.c is the consumer). A state is the engine
 * image of the experiments the partition's message keys name, its
 * counters and the next offset to read; it goes to the same partition
 * of the compacted state topic in one transaction with the input
 * offset, from a producer whose transactional.id belongs to the input
 * partition, and comes back (read_committed) when a daemon is assigned
 * the partition. Each partition has its own engine (p->eng, listed in
 * the daemon's engines while the partition runs), so its state is that
 * engine's whole image and a revocation drops exactly its experiments.
 */
#include <inttypes.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <librdkafka/rdkafka.h>

#include "stopcock/log.h"
#include "kafka_in_int.h"

static size_t	kafka_state_stray(struct kafka_part *);

/* ---- one partition's state image ---- */

static json_t *
kafka_state_counts_json(const struct kafka_counts *c)
{
	json_t *o = json_object(), *bad = json_object(), *rej = json_object();
	int r;

	json_object_set_new(o, "messages", json_integer((json_int_t)
	    c->messages));
	json_object_set_new(o, "bytes", json_integer((json_int_t)c->bytes));
	json_object_set_new(o, "lines", json_integer((json_int_t)c->lines));
	json_object_set_new(o, "records", json_integer((json_int_t)
	    c->records));
	for (r = 0; r < KB_N; r++)
		json_object_set_new(bad, kafka_bad_names[r],
		    json_integer((json_int_t)c->bad[r]));
	for (r = PROTO_SKIP + 1; r < PROTO_NSTATUS; r++)
		if (c->proto_rejected[r] != 0)
			json_object_set_new(rej, proto_reason(r),
			    json_integer((json_int_t)c->proto_rejected[r]));
	for (r = ENGINE_OK + 1; r < ENGINE_NREJECT; r++)
		if (c->engine_rejected[r] != 0)
			json_object_set_new(rej, engine_reason(r),
			    json_integer((json_int_t)c->engine_rejected[r]));
	json_object_set_new(o, "bad", bad);
	json_object_set_new(o, "rejected", rej);
	return o;
}

static uint64_t
kafka_state_u64(const json_t *o, const char *key)
{
	json_t *v = json_object_get(o, key);

	return json_is_integer(v) && json_integer_value(v) > 0 ?
	    (uint64_t)json_integer_value(v) : 0;
}

static void
kafka_state_counts_restore(struct kafka_counts *c, const json_t *o)
{
	const json_t *bad = json_object_get(o, "bad");
	const json_t *rej = json_object_get(o, "rejected");
	int r;

	memset(c, 0, sizeof *c);
	c->messages = kafka_state_u64(o, "messages");
	c->bytes = kafka_state_u64(o, "bytes");
	c->lines = kafka_state_u64(o, "lines");
	c->records = kafka_state_u64(o, "records");
	for (r = 0; r < KB_N; r++)
		c->bad[r] = kafka_state_u64(bad, kafka_bad_names[r]);
	for (r = PROTO_SKIP + 1; r < PROTO_NSTATUS; r++)
		c->proto_rejected[r] = kafka_state_u64(rej, proto_reason(r));
	for (r = ENGINE_OK + 1; r < ENGINE_NREJECT; r++)
		c->engine_rejected[r] = kafka_state_u64(rej, engine_reason(r));
}

static void
kafka_state_noop(void *arg, const struct finding *f)
{
}

/* The experiment is one of the partition's (its engine holds it). */
static int
kafka_state_mine(void *arg, const char *experiment)
{
	struct kafka_part *p = arg;

	return p->eng != NULL &&
	    engine_foreach_in(p->eng, experiment, kafka_state_noop, NULL) == 0;
}

/*
 * {"format", "version", "topic", "partition", "next", "keys": [...],
 *  "counters": {...}, "engine": engine_save(p->eng),
 *  "webhooks": webhook_pending, "pause": pause_carry,
 *  "alerts": alert_carry} (the last three of the partition's
 * experiments: the deliveries not yet answered, so a lost host loses no
 * queued alert; the pause marks; the alerts themselves, raised,
 * acknowledged or closed, so the next owner knows their later life). A
 * state of an earlier daemon without some of the last three (or whose
 * engine held only "format", "version" and "experiments") restores the
 * same way.
 */
static json_t *
kafka_state_image(struct kafka_in *k, struct kafka_part *p)
{
	json_t *keys = json_array(), *v;
	const char *id;

	json_object_foreach(p->keys, id, v)
		json_array_append_new(keys, json_string(id));
	return json_pack("{s:s, s:i, s:s, s:i, s:I, s:o, s:o, s:o, s:o, s:o, "
	    "s:o}",
	    "format", KAFKA_STATE_FORMAT, "version", KAFKA_STATE_VERSION,
	    "topic", k->topic, "partition", (int)p->id,
	    "next", (json_int_t)p->next, "keys", keys,
	    "counters", kafka_state_counts_json(&p->c),
	    "engine", engine_save(p->eng),
	    "webhooks", webhook_pending(k->d->webhook, kafka_state_mine, p),
	    "pause", pause_carry(k->d->pause, kafka_state_mine, p),
	    "alerts", alert_carry(k->d->alert, kafka_state_mine, p));
}

static char *
kafka_state_key(struct kafka_in *k, int32_t id)
{
	char *key;

	/* the group too, so groups sharing a state topic never mix */
	xasprintf(&key, "%s/%s/%" PRId32, k->group, k->topic,
	    id);
	return key;
}

/* ---- transactions ---- */

static void
kafka_state_abort(struct kafka_part *p)
{
	rd_kafka_error_t *e;

	if ((e = rd_kafka_abort_transaction(p->txn, KAFKA_TXN_MS)) != NULL) {
		log_warnx("kafka: abort_transaction: %s partition=%" PRId32,
		    rd_kafka_error_string(e), p->id);
		rd_kafka_error_destroy(e);
	}
}

static void
kafka_state_pause(struct kafka_in *k, int32_t id)
{
	rd_kafka_topic_partition_list_t *l;

	l = rd_kafka_topic_partition_list_new(1);
	rd_kafka_topic_partition_list_add(l, k->topic, id);
	rd_kafka_pause_partitions(k->rk, l);
	rd_kafka_topic_partition_list_destroy(l);
}

/*
 * The partition's engine leaves the daemon (revoked, lost, fenced), after
 * its last commit: its experiments' alerts go too, the next owner's now,
 * so two daemons never both remind.
 */
void
kafka_state_drop(struct kafka_in *k, struct kafka_part *p)
{
	size_t n;

	if (p->eng == NULL)
		return;
	if ((n = alert_carry_forget(k->d->alert, kafka_state_mine, p)) > 0)
		log_info("kafka: alerts left with the partition partition=%"
		    PRId32 " alerts=%zu", p->id, n);
	engines_remove(k->d, p->eng);
	engine_free(p->eng);
	p->eng = NULL;
}

/* Another owner has the partition's transactional.id: stop, forget. */
static void
kafka_state_fenced(struct kafka_in *k, struct kafka_part *p, const char *why)
{
	log_crit("kafka: partition fenced: %s; another daemon owns it now, "
	    "this one stops testing its experiments partition=%" PRId32
	    " experiments=%zu", why, p->id, json_object_size(p->keys));
	k->fenced++;
	p->state = KP_FENCED;
	kafka_state_pause(k, p->id);
	kafka_state_drop(k, p);
	json_object_clear(p->keys);
}

/* A failed transactional call: fenced (fatal) or abort and retry later. */
static void
kafka_state_failed(struct kafka_in *k, struct kafka_part *p, const char *call,
    rd_kafka_error_t *e, int begun)
{
	char why[512];

	p->commit_failures++;
	snprintf(why, sizeof why, "%s: %s", call, rd_kafka_error_string(e));
	if (rd_kafka_error_is_fatal(e) ||
	    rd_kafka_error_code(e) == RD_KAFKA_RESP_ERR__FENCED) {
		rd_kafka_error_destroy(e);
		kafka_state_fenced(k, p, why);
		return;
	}
	log_warnx("kafka: commit failed, retried at the next one: %s "
	    "partition=%" PRId32, why, p->id);
	if (begun || rd_kafka_error_txn_requires_abort(e))
		kafka_state_abort(p);
	rd_kafka_error_destroy(e);
}

/*
 * One partition's transaction: prepared on the loop (the state image,
 * its text, the consumer group's metadata), run on a thread of its own
 * (only librdkafka calls on the partition's own producer, which is
 * thread-safe), finished on the loop (counters, logs, fencing). Each
 * transaction waits for round trips to the coordinators (a few hundred
 * ms each on the mock cluster), so a commit of many partitions one by
 * one held the loop for their sum (11 s for 32 partitions in
 * bench/kafka.py's stall phase); side by side it holds it for about
 * the slowest one.
 */
struct kafka_txn {
	struct kafka_part	*p;
	struct kafka_in		*k;
	char			*buf;	/* the state; librdkafka's once produced */
	size_t			 len;
	char			*key;
	int64_t			 next;
	uint64_t		 findings;
	rd_kafka_consumer_group_metadata_t *cgmd;
	const char		*call;	/* the call that failed, NULL if none */
	rd_kafka_error_t	*e;
	rd_kafka_resp_err_t	 err;	/* producev's, when call is it */
	int			 begun;
	pthread_t		 th;
	int			 threaded;
};

static void
kafka_state_txn_prepare(struct kafka_in *k, struct kafka_part *p,
    struct kafka_txn *t)
{
	struct engine_counters ec;
	json_t *state;

	memset(t, 0, sizeof *t);
	t->p = p;
	t->k = k;
	engine_counters(p->eng, &ec);
	t->findings = ec.findings;
	t->next = p->next;
	state = kafka_state_image(k, p);
	t->buf = json_dumps(state, JSON_COMPACT);
	json_decref(state);
	if (t->buf == NULL)
		fatalx("kafka: cannot serialise a partition state");
	t->len = strlen(t->buf);
	t->key = kafka_state_key(k, p->id);
	t->cgmd = rd_kafka_consumer_group_metadata(k->rk);
}

/* On its own thread: nothing here may touch the daemon but p->txn. */
static void *
kafka_state_txn_run(void *arg)
{
	struct kafka_txn *t = arg;
	rd_kafka_topic_partition_list_t *off;
	rd_kafka_t *txn = t->p->txn;

	if ((t->e = rd_kafka_begin_transaction(txn)) != NULL) {
		t->call = "begin_transaction";
		return NULL;
	}
	t->begun = 1;
	t->err = rd_kafka_producev(txn, RD_KAFKA_V_TOPIC(t->k->state_topic),
	    RD_KAFKA_V_PARTITION(t->p->id),
	    RD_KAFKA_V_KEY(t->key, strlen(t->key)),
	    RD_KAFKA_V_VALUE(t->buf, t->len),
	    RD_KAFKA_V_MSGFLAGS(RD_KAFKA_MSG_F_FREE), RD_KAFKA_V_END);
	if (t->err != 0) {
		t->call = "producev";
		return NULL;
	}
	t->buf = NULL;
	off = rd_kafka_topic_partition_list_new(1);
	rd_kafka_topic_partition_list_add(off, t->k->topic, t->p->id)->offset =
	    t->next;
	t->e = rd_kafka_send_offsets_to_transaction(txn, off, t->cgmd,
	    KAFKA_TXN_MS);
	rd_kafka_topic_partition_list_destroy(off);
	if (t->e != NULL) {
		t->call = "send_offsets_to_transaction";
		return NULL;
	}
	if ((t->e = rd_kafka_commit_transaction(txn, KAFKA_TXN_MS)) != NULL)
		t->call = "commit_transaction";
	return NULL;
}

/* Back on the loop: 0 committed, -1 not. */
static int
kafka_state_txn_finish(struct kafka_in *k, struct kafka_txn *t)
{
	struct kafka_part *p = t->p;
	int rc = -1;

	if (t->call == NULL) {
		p->committed = t->next;
		p->dirty = 0;
		p->findings = t->findings;
		p->stray = kafka_state_stray(p);
		p->commits++;
		log_debug("kafka: committed partition=%" PRId32 " next=%" PRId64
		    " bytes=%zu", p->id, t->next, t->len);
		rc = 0;
	} else if (t->e == NULL) {
		p->commit_failures++;
		log_warnx("kafka: cannot produce the state: %s partition=%"
		    PRId32 " bytes=%zu", rd_kafka_err2str(t->err), p->id,
		    t->len);
		kafka_state_abort(p);
	} else
		kafka_state_failed(k, p, t->call, t->e, t->begun);
	free(t->buf);
	free(t->key);
	rd_kafka_consumer_group_metadata_destroy(t->cgmd);
	return rc;
}

/*
 * State and input offset in one transaction for each of parts[0..n),
 * up to KAFKA_TXN_PARALLEL side by side. The number committed.
 */
int
kafka_state_commit(struct kafka_in *k, struct kafka_part **parts, int n)
{
	struct kafka_txn t[KAFKA_TXN_PARALLEL];
	int i, j, m, done = 0;

	for (i = 0; i < n; i += m) {
		m = n - i < KAFKA_TXN_PARALLEL ? n - i : KAFKA_TXN_PARALLEL;
		for (j = 0; j < m; j++) {
			kafka_state_txn_prepare(k, parts[i + j], &t[j]);
			/* a single one, or no thread to be had: here */
			t[j].threaded = m > 1 && pthread_create(&t[j].th, NULL,
			    kafka_state_txn_run, &t[j]) == 0;
			if (!t[j].threaded)
				kafka_state_txn_run(&t[j]);
		}
		for (j = 0; j < m; j++) {
			if (t[j].threaded)
				pthread_join(t[j].th, NULL);
			done += kafka_state_txn_finish(k, &t[j]) == 0;
		}
	}
	return done;
}

/*
 * Experiments of a partition's engine that no message key of it named:
 * records sent under another experiment's key. They are kept in that
 * partition's state, but their records may travel in other partitions
 * too, and then they are split between engines (and daemons).
 */
static size_t
kafka_state_stray(struct kafka_part *p)
{
	json_t *img = engine_json_list(p->eng), *e;
	const char *id;
	size_t i, n = 0;

	json_array_foreach(json_object_get(img, "experiments"), i, e) {
		id = kafka_str(json_string_value(json_object_get(e, "id")));
		n += json_object_get(p->keys, id) == NULL;
	}
	json_decref(img);
	return n;
}

int
kafka_state_commit_of(struct kafka_in *k, const char *experiment)
{
	struct kafka_part *p;
	int32_t i;

	if (k == NULL || k->closed)
		return 0;
	for (i = 0; i < KAFKA_PARTITIONS_MAX; i++) {
		if ((p = k->parts[i]) == NULL || p->state != KP_RUNNING ||
		    !kafka_state_mine(p, experiment))
			continue;
		p->dirty = 1;	/* kept when this commit fails */
		dispatch_drain(k->d->dispatch);
		return kafka_state_commit(k, &p, 1) == 1 ? 0 : -1;
	}
	return 0;
}

void
kafka_state_commit_all(struct kafka_in *k, const char *why)
{
	struct kafka_part *due[KAFKA_PARTITIONS_MAX];
	struct engine_counters ec;
	size_t stray = 0;
	int32_t i;
	int n = 0, tried = 0;
	double t0 = daemon_now();

	/* the alerts of what is saved reach the webhook queue first */
	dispatch_drain(k->d->dispatch);
	for (i = 0; i < KAFKA_PARTITIONS_MAX; i++) {
		struct kafka_part *p = k->parts[i];

		if (p == NULL || p->state != KP_RUNNING || p->eng == NULL)
			continue;
		engine_counters(p->eng, &ec);
		if (p->dirty || ec.findings != p->findings)
			due[tried++] = p;
	}
	if (tried > 0)
		n = kafka_state_commit(k, due, tried);
	for (i = 0; i < KAFKA_PARTITIONS_MAX; i++)
		if (k->parts[i] != NULL && k->parts[i]->state == KP_RUNNING)
			stray += k->parts[i]->stray;
	if (stray > k->stray)
		log_warnx("kafka: %zu experiments came in messages keyed by "
		    "another experiment; if their records travel in several "
		    "partitions they are split (the key must be the "
		    "experiment id)", stray);
	k->stray = stray;
	if (tried > 0)
		log_debug("kafka: commit reason=%s partitions=%d of %d ms=%.0f",
		    why, n, tried, (daemon_now() - t0) * 1e3);
}

/* A partition's transactional producer, fencing any earlier owner. */
rd_kafka_t *
kafka_state_producer(struct kafka_in *k, int32_t id, char **cause)
{
	rd_kafka_conf_t *conf;
	rd_kafka_t *rk;
	rd_kafka_error_t *e;
	char err[512], *tid, *suffix, tmo[32];

	xasprintf(&suffix, "-txn-%" PRId32, id);
	conf = kafka_in_conf(k, suffix, cause);
	free(suffix);
	if (conf == NULL)
		return NULL;
	/* One id per input partition, the same whoever owns it. */
	xasprintf(&tid, "stopcock.%s.%s.%" PRId32, k->group,
	    k->topic, id);
	snprintf(tmo, sizeof tmo, "%d", KAFKA_TXN_MS * 6);
	if (kafka_in_set(conf, "transactional.id", tid, cause) != 0 ||
	    kafka_in_set(conf, "transaction.timeout.ms", tmo, cause) != 0 ||
	    kafka_in_set(conf, "message.max.bytes", "100000000", cause) != 0) {
		free(tid);
		rd_kafka_conf_destroy(conf);
		return NULL;
	}
	free(tid);
	rk = rd_kafka_new(RD_KAFKA_PRODUCER, conf, err, sizeof err);
	if (rk == NULL) {
		rd_kafka_conf_destroy(conf);
		xasprintf(cause, "kafka: producer: %s", err);
		return NULL;
	}
	if ((e = rd_kafka_init_transactions(rk, KAFKA_TXN_MS)) != NULL) {
		xasprintf(cause, "init_transactions: %s",
		    rd_kafka_error_string(e));
		rd_kafka_error_destroy(e);
		rd_kafka_destroy(rk);
		return NULL;
	}
	return rk;
}

/*
 * Read the state partitions of every r[i].id at once, to their ends
 * (read_committed: to the last stable offset), keeping the last state
 * message of each. One pass for the whole assignment, so the loop
 * stands still once per rebalance, not once per partition.
 */
void
kafka_state_read(struct kafka_in *k, struct kafka_read *r, int n)
{
	rd_kafka_topic_partition_list_t *l;
	rd_kafka_message_t *m;
	rd_kafka_resp_err_t err;
	json_error_t jerr;
	double deadline = daemon_now() + KAFKA_LOAD_MS / 1000.0;
	char *key;
	int i, left = n;

	if (n == 0)
		return;
	l = rd_kafka_topic_partition_list_new(n);
	for (i = 0; i < n; i++)
		rd_kafka_topic_partition_list_add(l, k->state_topic,
		    r[i].id)->offset = RD_KAFKA_OFFSET_BEGINNING;
	err = rd_kafka_assign(k->reader, l);
	rd_kafka_topic_partition_list_destroy(l);
	if (err != 0) {
		for (i = 0; i < n; i++)
			xasprintf(&r[i].cause, "assign %s/%" PRId32 ": %s",
			    k->state_topic, r[i].id, rd_kafka_err2str(err));
		return;
	}
	while (left > 0 && daemon_now() < deadline) {
		if ((m = rd_kafka_consumer_poll(k->reader, 100)) == NULL)
			continue;
		for (i = 0; i < n && r[i].id != m->partition; i++)
			;
		if (i == n || r[i].done) {
			rd_kafka_message_destroy(m);
			continue;
		}
		if (m->err == RD_KAFKA_RESP_ERR__PARTITION_EOF) {
			r[i].done = 1;
			left--;
		} else if (m->err == RD_KAFKA_RESP_ERR__UNKNOWN_PARTITION ||
		    m->err == RD_KAFKA_RESP_ERR__UNKNOWN_TOPIC ||
		    m->err == RD_KAFKA_RESP_ERR_UNKNOWN_TOPIC_OR_PART) {
			xasprintf(&r[i].cause, "%s/%" PRId32 ": %s (the state "
			    "topic needs as many partitions as the input)",
			    k->state_topic, r[i].id, rd_kafka_err2str(m->err));
			r[i].done = 1;
			left--;
		} else if (m->err != 0)
			log_warnx("kafka: reading state: %s partition=%" PRId32,
			    rd_kafka_message_errstr(m), r[i].id);
		else {
			key = kafka_state_key(k, r[i].id);
			if (m->key_len == strlen(key) &&
			    memcmp(m->key, key, m->key_len) == 0) {
				json_decref(r[i].state);
				r[i].found = 1;
				r[i].state = json_loadb(m->payload, m->len, 0,
				    &jerr);
				if (r[i].state == NULL) {
					xasprintf(&r[i].cause, "state at "
					    "offset %" PRId64 " is not JSON: "
					    "%s", m->offset, jerr.text);
					r[i].done = 1;
					left--;
				}
			}
			free(key);
		}
		rd_kafka_message_destroy(m);
	}
	for (i = 0; i < n; i++)
		if (!r[i].done && r[i].cause == NULL)
			xasprintf(&r[i].cause, "reading %s/%" PRId32 " took "
			    "more than %d ms", k->state_topic, r[i].id,
			    KAFKA_LOAD_MS);
	rd_kafka_assign(k->reader, NULL);
}

void
kafka_state_refuse(struct kafka_in *k, struct kafka_part *p,
    enum kafka_refusal r, const char *what, const char *detail)
{
	k->refused[r]++;
	p->state = KP_REFUSED;
	log_crit("kafka: partition REFUSED, not consumed and not started "
	    "afresh: %s%s%s partition=%" PRId32 " reason=%s", what,
	    detail != NULL ? ": " : "", detail != NULL ? detail : "", p->id,
	    kafka_refusal_names[r]);
}

/*
 * Rebuild partition p from the state topic and decide where it resumes.
 * committed is the group's committed offset (RD_KAFKA_OFFSET_INVALID:
 * none). Sets p->state and p->next.
 */
void
kafka_state_load(struct kafka_in *k, struct kafka_part *p, int64_t committed,
    struct kafka_read *r)
{
	json_t *state = r->state, *keys, *v;
	char *cause = NULL;
	const char *fmt;
	struct engine_counters ec;
	int64_t next;
	size_t i, n;

	if (r->cause != NULL) {
		kafka_state_refuse(k, p, r->found ? KR_BAD_STATE :
		    KR_UNREACHABLE, "cannot read its state", r->cause);
		return;
	}
	if (!r->found) {
		if (committed >= 0) {
			char detail[64];

			snprintf(detail, sizeof detail, "committed offset %"
			    PRId64, committed);
			kafka_state_refuse(k, p, KR_NO_STATE, "the group has a "
			    "committed offset but the state topic holds no "
			    "state for it", detail);
			return;
		}
		log_info("kafka: partition starts afresh (no state, no "
		    "committed offset) partition=%" PRId32, p->id);
		p->next = -1;
		p->committed = -1;
		p->state = KP_RUNNING;
		p->eng = engine_new_shard(k->d->conf, k->d->hashkey);
		engines_add(k->d, p->eng);
		return;
	}
	fmt = json_string_value(json_object_get(state, "format"));
	next = json_integer_value(json_object_get(state, "next"));
	keys = json_object_get(state, "keys");
	if (fmt == NULL || strcmp(fmt, KAFKA_STATE_FORMAT) != 0 ||
	    json_integer_value(json_object_get(state, "version")) !=
	    KAFKA_STATE_VERSION || !json_is_array(keys) ||
	    json_integer_value(json_object_get(state, "partition")) != p->id) {
		kafka_state_refuse(k, p, KR_BAD_STATE, "its state is not a "
		    "stopcock partition state of this version and partition",
		    NULL);
		return;
	}
	if (committed >= 0 && committed != next) {
		char detail[96];

		snprintf(detail, sizeof detail, "state resumes at %" PRId64
		    ", committed offset %" PRId64, next, committed);
		kafka_state_refuse(k, p, KR_MISMATCH, "state and committed "
		    "offset disagree", detail);
		return;
	}
	if (committed < 0)
		log_warnx("kafka: the group has no committed offset (expired, "
		    "or a broker that keeps no transactional offsets, as the "
		    "mock cluster); resuming from the state's partition=%"
		    PRId32 " next=%" PRId64, p->id, next);
	if ((p->eng = engine_restore_shard(k->d->conf, k->d->hashkey,
	    json_object_get(state, "engine"), &cause)) == NULL) {
		kafka_state_refuse(k, p, KR_BAD_STATE, "its state does not "
		    "restore", cause);
		free(cause);
		return;
	}
	engines_add(k->d, p->eng);
	engine_counters(p->eng, &ec);
	p->findings = ec.findings;
	if ((n = webhook_adopt(k->d->webhook, json_object_get(state,
	    "webhooks"))) > 0)
		log_info("kafka: deliveries carried in the partition's state "
		    "queued again partition=%" PRId32 " deliveries=%zu", p->id,
		    n);
	pause_adopt(k->d->pause, json_object_get(state, "pause"));
	if ((n = alert_carry_adopt(k->d->alert, json_object_get(state,
	    "alerts"))) > 0)
		log_info("kafka: alerts carried in the partition's state taken "
		    "over partition=%" PRId32 " alerts=%zu", p->id, n);
	json_array_foreach(keys, i, v)
		if (json_is_string(v))
			json_object_set_new(p->keys, json_string_value(v),
			    json_true());
	kafka_state_counts_restore(&p->c, json_object_get(state, "counters"));
	p->stray = kafka_state_stray(p);
	p->next = next;
	p->committed = next;
	p->state = KP_RUNNING;
	log_info("kafka: partition restored from the state topic partition=%"
	    PRId32 " next=%" PRId64 " experiments=%zu messages=%" PRIu64
	    " records=%" PRIu64, p->id, next, json_object_size(p->keys),
	    p->c.messages, p->c.records);
}
