/*
 * kafka_in.c: the Kafka input (librdkafka). Daemons of one consumer
 * group share the partitions of [kafka] topic (cooperative-sticky
 * assignment; static membership through group.instance.id, so a restart
 * within the session timeout keeps the partitions without a rebalance).
 * A message's key is its experiment's id and its value one or more
 * record lines, handed to ingest_lines exactly as a Redis entry is.
 *
 * Exactly-once state. Every commit_every, and when a partition is
 * revoked, each owned partition that read something since its last
 * commit writes its state (the engine image of the experiments its
 * messages named, its counters and the next offset to read) to the same
 * partition of the compacted state topic, and commits the input offset,
 * in one transaction of a producer whose transactional.id belongs to that
 * input partition. A new owner's init_transactions fences the old one
 * and settles its open transaction; the new owner then reads the state
 * back (read_committed) and resumes from the committed offset, which must
 * be the state's own. A committed offset without a state, or one that
 * disagrees with it, refuses the partition loudly (logged, counted, the
 * partition paused), never starts it afresh.
 *
 * Each owned partition has its own engine, built from its state on
 * assignment and freed on revocation (engines.c lists it with the
 * daemon's others for the API and metrics), so each daemon tests only
 * the experiments of the partitions it owns and a rebalance touches no
 * other partition's. The states, transactions and the state read live
 * in kafka_state.c (kafka_in_int.h is what the two share). The
 * transactional calls and the state read block
 * the loop for a bounded time (KAFKA_TXN_MS, KAFKA_LOAD_MS); on loopback
 * that is milliseconds, on a sick cluster it is a stall, not a loss.
 */
#include <errno.h>
#include <fcntl.h>
#include <inttypes.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <event2/event.h>
#include <librdkafka/rdkafka.h>

#include "stopcock/log.h"
#include "kafka_in_int.h"

const char *const kafka_pstate_names[] = {
	"running", "refused", "fenced"
};

const char *const kafka_bad_names[] = { "bad_key", "too_big" };

const char *const kafka_refusal_names[] = {
	"no_state", "offset_mismatch", "bad_state", "unreachable"
};

/* client.id and group.instance.id: %h the host name, %% a percent. */
static char *
kafka_expand(const char *tmpl)
{
	char host[KAFKA_HOST_MAX], *out, *o;
	const char *s;
	size_t hl;

	if (gethostname(host, sizeof host) != 0)
		strcpy(host, "localhost");
	host[sizeof host - 1] = '\0';
	hl = strlen(host);
	out = o = xcalloc(1, strlen(tmpl) * (hl + 1) + 1);
	for (s = tmpl; *s != '\0'; s++) {
		if (s[0] == '%' && s[1] == 'h') {
			memcpy(o, host, hl);
			o += hl;
			s++;
		} else if (s[0] == '%' && s[1] == '%') {
			*o++ = '%';
			s++;
		} else
			*o++ = *s;
	}
	*o = '\0';
	return out;
}

int
kafka_in_set(rd_kafka_conf_t *conf, const char *key, const char *value,
    char **cause)
{
	char err[512];

	if (rd_kafka_conf_set(conf, key, value, err, sizeof err) ==
	    RD_KAFKA_CONF_OK)
		return 0;
	xasprintf(cause, "kafka: %s=%s: %s", key, value, err);
	return -1;
}

static void
kafka_log_cb(const rd_kafka_t *rk, int level, const char *fac,
    const char *buf)
{
	if (level <= 3)
		log_warnx("kafka: %s: %s client=%s", fac, buf,
		    rd_kafka_name(rk));
	else
		log_debug("kafka: %s: %s client=%s", fac, buf,
		    rd_kafka_name(rk));
}

static void
kafka_error_cb(rd_kafka_t *rk, int err, const char *reason, void *arg)
{
	struct kafka_in *k = arg;

	k->consume_errors++;
	log_warnx("kafka: %s: %s client=%s", rd_kafka_err2name(err), reason,
	    rd_kafka_name(rk));
}

/* The shared part of every handle's configuration. */
rd_kafka_conf_t *
kafka_in_conf(struct kafka_in *k, const char *suffix, char **cause)
{
	struct conf *c = k->d->conf;
	rd_kafka_conf_t *conf = rd_kafka_conf_new();
	char *id;
	int rc;

	xasprintf(&id, "%s%s", k->client_id, suffix);
	rc = kafka_in_set(conf, "bootstrap.servers", c->kafka_brokers, cause);
	if (rc == 0)
		rc = kafka_in_set(conf, "client.id", id, cause);
	free(id);
	if (rc != 0) {
		rd_kafka_conf_destroy(conf);
		return NULL;
	}
	rd_kafka_conf_set_log_cb(conf, kafka_log_cb);
	rd_kafka_conf_set_error_cb(conf, kafka_error_cb);
	rd_kafka_conf_set_opaque(conf, k);
	return conf;
}

static void
kafka_commit_cb(evutil_socket_t fd, short what, void *arg)
{
	struct kafka_in *k = arg;

	if (!k->closed)
		kafka_state_commit_all(k, "timer");
}

/* ---- assignment ---- */

static void
kafka_part_free(struct kafka_in *k, struct kafka_part *p)
{
	if (p == NULL)
		return;
	kafka_state_drop(k, p);
	if (p->txn != NULL)
		rd_kafka_destroy(p->txn);
	json_decref(p->keys);
	free(p);
}

static void
kafka_assign(struct kafka_in *k, rd_kafka_topic_partition_list_t *l)
{
	rd_kafka_topic_partition_list_t *co, *pause;
	rd_kafka_error_t *e;
	rd_kafka_resp_err_t err;
	struct kafka_part *p;
	struct kafka_read *reads;
	char *cause = NULL;
	int i, j, nreads = 0;
	int64_t committed;
	double t0 = daemon_now(), t1, t2;

	/* Fence earlier owners first: their open transactions settle, so
	 * the offsets and states read below are the last committed. */
	for (i = 0; i < l->cnt; i++) {
		int32_t id = l->elems[i].partition;

		if (strcmp(l->elems[i].topic, k->topic) != 0 || id < 0 ||
		    id >= KAFKA_PARTITIONS_MAX || k->parts[id] != NULL)
			continue;
		p = xcalloc(1, sizeof *p);
		p->id = id;
		p->keys = json_object();
		p->next = p->committed = -1;
		k->parts[id] = p;
		k->assigned++;
		if ((p->txn = kafka_state_producer(k, id, &cause)) == NULL) {
			kafka_state_refuse(k, p, KR_UNREACHABLE,
			    "no transactional producer", cause);
			free(cause);
			cause = NULL;
		}
	}
	t1 = daemon_now();
	co = rd_kafka_topic_partition_list_copy(l);
	err = rd_kafka_committed(k->rk, co, KAFKA_LOAD_MS);
	t2 = daemon_now();
	reads = xcalloc((size_t)l->cnt + 1, sizeof *reads);
	for (i = 0; i < l->cnt; i++) {
		int32_t id = l->elems[i].partition;

		if (id >= 0 && id < KAFKA_PARTITIONS_MAX &&
		    (p = k->parts[id]) != NULL && p->state == KP_RUNNING &&
		    p->txn != NULL)
			reads[nreads++].id = id;
	}
	kafka_state_read(k, reads, nreads);
	pause = rd_kafka_topic_partition_list_new(l->cnt);
	for (i = 0; i < l->cnt; i++) {
		int32_t id = l->elems[i].partition;

		if (id < 0 || id >= KAFKA_PARTITIONS_MAX ||
		    (p = k->parts[id]) == NULL) {
			log_crit("kafka: partition beyond %d refused "
			    "partition=%" PRId32, KAFKA_PARTITIONS_MAX, id);
			rd_kafka_topic_partition_list_add(pause,
			    l->elems[i].topic, id);
			continue;
		}
		if (p->state == KP_RUNNING && p->txn != NULL) {
			committed = co->elems[i].offset;
			if (err != 0 || co->elems[i].err != 0)
				kafka_state_refuse(k, p, KR_UNREACHABLE,
				    "cannot read the committed offset",
				    rd_kafka_err2str(err != 0 ? err :
				    co->elems[i].err));
			else {
				for (j = 0; j < nreads && reads[j].id != id;
				    j++)
					;
				kafka_state_load(k, p, committed, &reads[j]);
			}
		}
		if (p->state == KP_RUNNING)
			l->elems[i].offset = p->next >= 0 ? p->next :
			    RD_KAFKA_OFFSET_BEGINNING;
		else
			rd_kafka_topic_partition_list_add(pause,
			    l->elems[i].topic, id);
	}
	rd_kafka_topic_partition_list_destroy(co);
	for (j = 0; j < nreads; j++) {
		json_decref(reads[j].state);
		free(reads[j].cause);
	}
	free(reads);
	/* the loop stood still this long: say where */
	log_info("kafka: assignment loaded partitions=%d fence_ms=%.0f "
	    "offsets_ms=%.0f states_ms=%.0f", l->cnt, (t1 - t0) * 1e3,
	    (t2 - t1) * 1e3, (daemon_now() - t2) * 1e3);
	if (strcmp(rd_kafka_rebalance_protocol(k->rk), "COOPERATIVE") == 0) {
		if ((e = rd_kafka_incremental_assign(k->rk, l)) != NULL) {
			log_warnx("kafka: incremental_assign: %s",
			    rd_kafka_error_string(e));
			rd_kafka_error_destroy(e);
		}
	} else if ((err = rd_kafka_assign(k->rk, l)) != 0)
		log_warnx("kafka: assign: %s", rd_kafka_err2str(err));
	if (pause->cnt > 0)
		rd_kafka_pause_partitions(k->rk, pause);
	rd_kafka_topic_partition_list_destroy(pause);
}

static void
kafka_revoke(struct kafka_in *k, rd_kafka_topic_partition_list_t *l)
{
	struct kafka_part *p, **due;
	rd_kafka_error_t *e;
	int i, lost = rd_kafka_assignment_lost(k->rk), committed = 0, ndue = 0;
	double t0 = daemon_now();

	if (lost)
		k->lost++;
	dispatch_drain(k->d->dispatch);	/* alerts before the state */
	due = xcalloc(l->cnt > 0 ? (size_t)l->cnt : 1, sizeof *due);
	for (i = 0; i < l->cnt; i++) {
		int32_t n = l->elems[i].partition;

		/* Lost means another owner may already have it: the
		 * commit would be fenced, so do not try. */
		if (n >= 0 && n < KAFKA_PARTITIONS_MAX &&
		    (p = k->parts[n]) != NULL && !lost &&
		    p->state == KP_RUNNING && p->dirty)
			due[ndue++] = p;
	}
	if (ndue > 0)
		committed = kafka_state_commit(k, due, ndue);
	free(due);
	for (i = 0; i < l->cnt; i++) {
		int32_t n = l->elems[i].partition;

		if (n < 0 || n >= KAFKA_PARTITIONS_MAX ||
		    (p = k->parts[n]) == NULL)
			continue;
		log_info("kafka: partition %s partition=%" PRId32 " state=%s "
		    "next=%" PRId64, lost ? "lost" : "revoked", n,
		    kafka_pstate_names[p->state], p->next);
		k->revoked++;
		k->parts[n] = NULL;
		kafka_part_free(k, p);
	}
	/* the loop stood still this long, as for an assignment */
	log_info("kafka: revocation done partitions=%d committed=%d "
	    "commit_ms=%.0f", l->cnt, committed, (daemon_now() - t0) * 1e3);
	if (strcmp(rd_kafka_rebalance_protocol(k->rk), "COOPERATIVE") == 0) {
		if ((e = rd_kafka_incremental_unassign(k->rk, l)) != NULL) {
			log_warnx("kafka: incremental_unassign: %s",
			    rd_kafka_error_string(e));
			rd_kafka_error_destroy(e);
		}
	} else
		rd_kafka_assign(k->rk, NULL);
}

static void
kafka_rebalance_cb(rd_kafka_t *rk, rd_kafka_resp_err_t err,
    rd_kafka_topic_partition_list_t *l, void *arg)
{
	struct kafka_in *k = arg;

	k->rebalances++;
	log_info("kafka: rebalance %s partitions=%d protocol=%s",
	    err == RD_KAFKA_RESP_ERR__ASSIGN_PARTITIONS ? "assign" :
	    err == RD_KAFKA_RESP_ERR__REVOKE_PARTITIONS ? "revoke" :
	    rd_kafka_err2name(err), l != NULL ? l->cnt : 0,
	    rd_kafka_rebalance_protocol(rk));
	switch (err) {
	case RD_KAFKA_RESP_ERR__ASSIGN_PARTITIONS:
		kafka_assign(k, l);
		break;
	case RD_KAFKA_RESP_ERR__REVOKE_PARTITIONS:
		kafka_revoke(k, l);
		break;
	default:
		log_warnx("kafka: rebalance failed: %s",
		    rd_kafka_err2str(err));
		break;
	}
}

/* ---- consuming ---- */

/* One header's value, or NULL (absent, or more than one byte limit). */
static const char *
kafka_header(rd_kafka_headers_t *h, const char *name, size_t *len)
{
	const void *v = NULL;

	*len = 0;
	if (h == NULL || rd_kafka_header_get_last(h, name, &v, len) !=
	    RD_KAFKA_RESP_ERR_NO_ERROR || v == NULL)
		return NULL;
	return v;
}

/* A signed batch: headers producer, id, ts, signature (frame.h). */
static void
kafka_signed(struct kafka_in *k, rd_kafka_message_t *m)
{
	rd_kafka_headers_t *h = NULL;
	const char *pr, *id, *ts, *sig;
	size_t prl, idl, tsl, sigl;

	if (rd_kafka_message_headers(m, &h) != RD_KAFKA_RESP_ERR_NO_ERROR)
		h = NULL;
	pr = kafka_header(h, "producer", &prl);
	id = kafka_header(h, "id", &idl);
	ts = kafka_header(h, "ts", &tsl);
	sig = kafka_header(h, "signature", &sigl);
	(void)auth_fields(k->d, SRC_KAFKA, pr, prl, id, idl, ts, tsl, sig,
	    sigl, m->payload, m->len);
}

/* Keys the owned partitions carry, all together (a new key costs a walk
 * over the partitions; a known one nothing). */
static size_t
kafka_keys(const struct kafka_in *k)
{
	size_t i, n = 0;

	for (i = 0; i < KAFKA_PARTITIONS_MAX; i++)
		if (k->parts[i] != NULL)
			n += json_object_size(k->parts[i]->keys);
	return n;
}

static void
kafka_message(struct kafka_in *k, rd_kafka_message_t *m)
{
	struct ingest_counters *ic = ingest_counters(k->d), before;
	struct kafka_part *p;
	struct engine *was;
	int r;

	if (m->err != 0) {
		if (m->err == RD_KAFKA_RESP_ERR__PARTITION_EOF)
			return;
		k->consume_errors++;
		log_warnx("kafka: consume: %s partition=%" PRId32,
		    rd_kafka_message_errstr(m), m->partition);
		return;
	}
	if (m->partition < 0 || m->partition >= KAFKA_PARTITIONS_MAX ||
	    (p = k->parts[m->partition]) == NULL || p->state != KP_RUNNING ||
	    (p->next >= 0 && m->offset < p->next)) {
		k->unowned++;	/* a fetch from before a rebalance */
		return;
	}
	p->c.messages++;
	p->c.bytes += m->len;
	p->next = m->offset + 1;
	p->dirty = 1;
	if (m->key == NULL || !proto_name_ok((const char *)m->key,
	    m->key_len)) {
		p->c.bad[KB_NO_KEY]++;
		ingest_reject(k->d, SRC_KAFKA, PROTO_E_BYTES, m->len,
		    m->payload, m->len < 80 ? m->len : 80);
		return;
	}
	if (m->len > k->max_message) {
		p->c.bad[KB_TOO_BIG]++;
		ingest_reject(k->d, SRC_KAFKA, PROTO_E_LONG, m->len,
		    m->payload, 80);
		return;
	}
	/* bounded like the engines, across the partitions: a new key per
	 * message must not grow it */
	if (json_object_getn(p->keys, m->key, m->key_len) == NULL &&
	    kafka_keys(k) < k->d->conf->max_experiments)
		json_object_setn_new(p->keys, m->key, m->key_len, json_true());
	/* The same door as a Redis entry; the differences are ours. */
	before = *ic;
	was = ingest_into(k->d, p->eng);
	if (auth_signed(k->d->conf, SRC_KAFKA))
		kafka_signed(k, m);
	else
		ingest_lines(k->d, SRC_KAFKA, m->payload, m->len);
	(void)ingest_into(k->d, was);
	p->c.lines += ic->lines[SRC_KAFKA] - before.lines[SRC_KAFKA];
	p->c.records += ic->records[SRC_KAFKA] - before.records[SRC_KAFKA];
	for (r = 0; r < PROTO_NSTATUS; r++)
		p->c.proto_rejected[r] += ic->proto_rejected[SRC_KAFKA][r] -
		    before.proto_rejected[SRC_KAFKA][r];
	for (r = 0; r < ENGINE_NREJECT; r++)
		p->c.engine_rejected[r] += ic->engine_rejected[SRC_KAFKA][r] -
		    before.engine_rejected[SRC_KAFKA][r];
}

/* Serve the consumer queue: messages, rebalances, errors. */
static void
kafka_drain(struct kafka_in *k)
{
	rd_kafka_message_t *m;
	int n;

	if (k->closed)
		return;
	for (n = 0; n < KAFKA_POLL_BUDGET; n++) {
		if ((m = rd_kafka_consumer_poll(k->rk, 0)) == NULL)
			return;
		kafka_message(k, m);
		rd_kafka_message_destroy(m);
		if (k->closed)
			return;
	}
	event_active(k->ev_more, EV_TIMEOUT, 0);	/* more after others */
}

static void
kafka_io_cb(evutil_socket_t fd, short what, void *arg)
{
	struct kafka_in *k = arg;
	char buf[64];

	while (read(fd, buf, sizeof buf) > 0)
		;
	kafka_drain(k);
}

static void
kafka_more_cb(evutil_socket_t fd, short what, void *arg)
{
	kafka_drain(arg);
}

/* ---- life cycle ---- */

struct kafka_in *
kafka_in_new(struct daemon *d, char **cause)
{
	struct kafka_in *k;
	struct conf *c = d->conf;
	rd_kafka_conf_t *conf;
	rd_kafka_topic_partition_list_t *sub;
	rd_kafka_resp_err_t err;
	char errstr[512], buf[32], *rgroup;
	struct timeval tv;
	int rc;

	k = xcalloc(1, sizeof *k);
	k->d = d;
	k->pipe[0] = k->pipe[1] = -1;
	k->topic = xstrdup(c->kafka_topic);
	k->group = xstrdup(c->kafka_group);
	k->state_topic = xstrdup(c->kafka_state_topic);
	k->client_id = kafka_expand(c->kafka_client_id);
	if (c->kafka_instance_id != NULL)
		k->instance_id = kafka_expand(c->kafka_instance_id);
	k->max_message = c->kafka_max_message;

	if ((conf = kafka_in_conf(k, "", cause)) == NULL)
		goto fail;
	snprintf(buf, sizeof buf, "%.0f", c->kafka_session_timeout * 1000);
	if (kafka_in_set(conf, "group.id", c->kafka_group, cause) != 0 ||
	    kafka_in_set(conf, "partition.assignment.strategy",
	    "cooperative-sticky", cause) != 0 ||
	    kafka_in_set(conf, "enable.auto.commit", "false", cause) != 0 ||
	    kafka_in_set(conf, "enable.auto.offset.store", "false",
	    cause) != 0 ||
	    kafka_in_set(conf, "isolation.level", "read_committed",
	    cause) != 0 ||
	    kafka_in_set(conf, "auto.offset.reset", "earliest", cause) != 0 ||
	    kafka_in_set(conf, "session.timeout.ms", buf, cause) != 0 ||
	    (k->instance_id != NULL && kafka_in_set(conf, "group.instance.id",
	    k->instance_id, cause) != 0)) {
		rd_kafka_conf_destroy(conf);
		goto fail;
	}
	rd_kafka_conf_set_rebalance_cb(conf, kafka_rebalance_cb);
	if ((k->rk = rd_kafka_new(RD_KAFKA_CONSUMER, conf, errstr,
	    sizeof errstr)) == NULL) {
		rd_kafka_conf_destroy(conf);
		xasprintf(cause, "kafka: consumer: %s", errstr);
		goto fail;
	}
	rd_kafka_poll_set_consumer(k->rk);

	if ((conf = kafka_in_conf(k, "-state", cause)) == NULL)
		goto fail;
	/* assign() wants a group.id; this one never joins or commits */
	xasprintf(&rgroup, "%s.state-reader", k->group);
	rc = kafka_in_set(conf, "group.id", rgroup, cause);
	free(rgroup);
	if (rc != 0 ||
	    kafka_in_set(conf, "isolation.level", "read_committed",
	    cause) != 0 ||
	    kafka_in_set(conf, "enable.partition.eof", "true", cause) != 0 ||
	    kafka_in_set(conf, "fetch.wait.max.ms", "10", cause) != 0 ||
	    kafka_in_set(conf, "enable.auto.commit", "false", cause) != 0 ||
	    kafka_in_set(conf, "fetch.message.max.bytes", "100000000",
	    cause) != 0 ||
	    kafka_in_set(conf, "receive.message.max.bytes", "200000000",
	    cause) != 0) {
		rd_kafka_conf_destroy(conf);
		goto fail;
	}
	if ((k->reader = rd_kafka_new(RD_KAFKA_CONSUMER, conf, errstr,
	    sizeof errstr)) == NULL) {
		rd_kafka_conf_destroy(conf);
		xasprintf(cause, "kafka: state reader: %s", errstr);
		goto fail;
	}

	/* librdkafka writes a byte to the pipe when the queue fills. */
	if (pipe2(k->pipe, O_NONBLOCK | O_CLOEXEC) != 0) {
		xasprintf(cause, "kafka: pipe: %s", strerror(errno));
		goto fail;
	}
	k->q = rd_kafka_queue_get_consumer(k->rk);
	rd_kafka_queue_io_event_enable(k->q, k->pipe[1], "1", 1);
	k->ev_io = event_new(d->base, k->pipe[0], EV_READ | EV_PERSIST,
	    kafka_io_cb, k);
	k->ev_more = event_new(d->base, -1, 0, kafka_more_cb, k);
	k->ev_poll = event_new(d->base, -1, EV_PERSIST, kafka_more_cb, k);
	k->ev_commit = event_new(d->base, -1, EV_PERSIST, kafka_commit_cb, k);
	if (k->ev_io == NULL || k->ev_more == NULL || k->ev_poll == NULL ||
	    k->ev_commit == NULL) {
		xasprintf(cause, "kafka: cannot create events");
		goto fail;
	}
	event_add(k->ev_io, NULL);
	tv.tv_sec = 0;
	tv.tv_usec = (suseconds_t)(KAFKA_POLL_EVERY * 1e6);
	event_add(k->ev_poll, &tv);
	tv.tv_sec = (time_t)c->kafka_commit_every;
	tv.tv_usec = (suseconds_t)((c->kafka_commit_every - tv.tv_sec) * 1e6);
	event_add(k->ev_commit, &tv);

	sub = rd_kafka_topic_partition_list_new(1);
	rd_kafka_topic_partition_list_add(sub, k->topic, RD_KAFKA_PARTITION_UA);
	err = rd_kafka_subscribe(k->rk, sub);
	rd_kafka_topic_partition_list_destroy(sub);
	if (err != 0) {
		xasprintf(cause, "kafka: subscribe %s: %s", k->topic,
		    rd_kafka_err2str(err));
		goto fail;
	}
	log_info("kafka: consuming brokers=%s topic=%s group=%s "
	    "state_topic=%s client_id=%s instance_id=%s", c->kafka_brokers,
	    k->topic, c->kafka_group, k->state_topic, k->client_id,
	    k->instance_id != NULL ? k->instance_id : "(dynamic)");
	return k;
fail:
	kafka_in_free(k);
	return NULL;
}

/*
 * Shutdown: commit every partition's state and offset, then leave (a
 * static member keeps its partitions until its session times out, so a
 * restart gets them back without a rebalance).
 */
void
kafka_in_stop(struct kafka_in *k)
{
	rd_kafka_resp_err_t err;

	if (k == NULL || k->closed)
		return;
	kafka_state_commit_all(k, "shutdown");
	k->closed = 1;
	event_del(k->ev_io);
	event_del(k->ev_poll);
	event_del(k->ev_commit);
	if ((err = rd_kafka_consumer_close(k->rk)) != 0)
		log_warnx("kafka: consumer_close: %s", rd_kafka_err2str(err));
}

void
kafka_in_free(struct kafka_in *k)
{
	int32_t i;

	if (k == NULL)
		return;
	if (k->rk != NULL && !k->closed) {
		k->closed = 1;
		rd_kafka_consumer_close(k->rk);
	}
	if (k->q != NULL)
		rd_kafka_queue_destroy(k->q);
	if (k->rk != NULL)
		rd_kafka_destroy(k->rk);
	if (k->reader != NULL) {
		rd_kafka_consumer_close(k->reader);
		rd_kafka_destroy(k->reader);
	}
	for (i = 0; i < KAFKA_PARTITIONS_MAX; i++)
		kafka_part_free(k, k->parts[i]);
	if (k->ev_io != NULL)
		event_free(k->ev_io);
	if (k->ev_more != NULL)
		event_free(k->ev_more);
	if (k->ev_poll != NULL)
		event_free(k->ev_poll);
	if (k->ev_commit != NULL)
		event_free(k->ev_commit);
	if (k->pipe[0] != -1)
		close(k->pipe[0]);
	if (k->pipe[1] != -1)
		close(k->pipe[1]);
	free(k->topic);
	free(k->group);
	free(k->state_topic);
	free(k->client_id);
	free(k->instance_id);
	free(k);
}

void
kafka_in_touched(struct kafka_in *k, struct engine *e)
{
	int32_t i;

	for (i = 0; i < KAFKA_PARTITIONS_MAX; i++)
		if (k->parts[i] != NULL && k->parts[i]->eng == e) {
			k->parts[i]->dirty = 1;
			return;
		}
}

/* ---- seeing it ---- */

json_t *
kafka_in_json(struct kafka_in *k)
{
	json_t *parts = json_array(), *exps, *list, *e;
	struct kafka_part *p;
	size_t j;
	int32_t i;

	for (i = 0; i < KAFKA_PARTITIONS_MAX; i++) {
		if ((p = k->parts[i]) == NULL)
			continue;
		/* what its engine holds, strays (another key) included */
		exps = json_array();
		list = p->eng != NULL ? engine_json_list(p->eng) : NULL;
		json_array_foreach(json_object_get(list, "experiments"), j, e)
			json_array_append(exps, json_object_get(e, "id"));
		json_decref(list);
		json_array_append_new(parts, json_pack("{s:i, s:s, s:I, s:I, "
		    "s:o}", "partition", (int)p->id, "state",
		    kafka_pstate_names[p->state], "read", (json_int_t)p->next,
		    "committed", (json_int_t)p->committed, "experiments",
		    exps));
	}
	return json_pack("{s:s, s:s, s:o}", "topic", k->topic, "group",
	    k->group, "partitions", parts);
}

#define KAFKA_EACH(k, p, i) \
	for ((i) = 0; (i) < KAFKA_PARTITIONS_MAX; (i)++) \
		if (((p) = (k)->parts[(i)]) != NULL)

static void
kafka_part_metric(struct evbuffer *b, struct kafka_in *k, const char *name,
    const char *type, const char *help, size_t off)
{
	struct kafka_part *p;
	int32_t i;

	metrics_family(b, name, type, help);
	KAFKA_EACH(k, p, i)
		evbuffer_add_printf(b, "%s{partition=\"%" PRId32 "\"} %" PRIu64
		    "\n", name, p->id, *(const uint64_t *)((const char *)p +
		    off));
}

void
kafka_in_metrics(struct kafka_in *k, struct evbuffer *b)
{
	struct kafka_part *p;
	int32_t i;
	int r;
	int64_t lo, hi;
	size_t stray = 0;

	metrics_family(b, "stopcock_kafka_partition_owned", "gauge",
	    "Input partitions this daemon holds, by state (running, refused: "
	    "a committed offset without a matching state, fenced).");
	KAFKA_EACH(k, p, i)
		evbuffer_add_printf(b, "stopcock_kafka_partition_owned{"
		    "partition=\"%" PRId32 "\",state=\"%s\"} 1\n", p->id,
		    kafka_pstate_names[p->state]);
	kafka_part_metric(b, k, "stopcock_kafka_messages_total", "counter",
	    "Messages read from the partition (kept in its state).",
	    offsetof(struct kafka_part, c.messages));
	kafka_part_metric(b, k, "stopcock_kafka_records_total", "counter",
	    "Records of the partition's messages applied to the engine.",
	    offsetof(struct kafka_part, c.records));
	kafka_part_metric(b, k, "stopcock_kafka_lines_total", "counter",
	    "Lines of the partition's messages, blank lines included.",
	    offsetof(struct kafka_part, c.lines));
	kafka_part_metric(b, k, "stopcock_kafka_commits_total", "counter",
	    "Transactions committed (state and offset) by this daemon.",
	    offsetof(struct kafka_part, commits));
	kafka_part_metric(b, k, "stopcock_kafka_commit_failures_total",
	    "counter", "Transactions that failed (retried at the next "
	    "commit, or the partition is fenced).",
	    offsetof(struct kafka_part, commit_failures));
	metrics_family(b, "stopcock_kafka_bad_messages_total", "counter",
	    "Messages refused whole: no valid key (the experiment id), or "
	    "larger than max_message.");
	KAFKA_EACH(k, p, i)
		for (r = 0; r < KB_N; r++)
			evbuffer_add_printf(b, "stopcock_kafka_bad_messages_"
			    "total{partition=\"%" PRId32 "\",reason=\"%s\"} %"
			    PRIu64 "\n", p->id, kafka_bad_names[r],
			    p->c.bad[r]);
	metrics_family(b, "stopcock_kafka_rejected_total", "counter",
	    "Lines of the partition refused by the protocol or the engine.");
	KAFKA_EACH(k, p, i) {
		for (r = PROTO_SKIP + 1; r < PROTO_NSTATUS; r++)
			evbuffer_add_printf(b, "stopcock_kafka_rejected_total{"
			    "partition=\"%" PRId32 "\",reason=\"%s\"} %" PRIu64
			    "\n", p->id, proto_reason(r),
			    p->c.proto_rejected[r]);
		for (r = ENGINE_OK + 1; r < ENGINE_NREJECT; r++)
			evbuffer_add_printf(b, "stopcock_kafka_rejected_total{"
			    "partition=\"%" PRId32 "\",reason=\"%s\"} %" PRIu64
			    "\n", p->id, engine_reason(r),
			    p->c.engine_rejected[r]);
	}
	metrics_family(b, "stopcock_kafka_partition_experiments", "gauge",
	    "Experiments whose messages the partition carried.");
	KAFKA_EACH(k, p, i)
		evbuffer_add_printf(b, "stopcock_kafka_partition_experiments{"
		    "partition=\"%" PRId32 "\"} %zu\n", p->id,
		    json_object_size(p->keys));
	metrics_family(b, "stopcock_kafka_partition_offset", "gauge",
	    "Next offset to read, and (committed) the next offset as last "
	    "committed with the partition's state; -1: from the start.");
	KAFKA_EACH(k, p, i)
		evbuffer_add_printf(b, "stopcock_kafka_partition_offset{"
		    "partition=\"%" PRId32 "\",kind=\"read\"} %" PRId64 "\n"
		    "stopcock_kafka_partition_offset{partition=\"%" PRId32
		    "\",kind=\"committed\"} %" PRId64 "\n", p->id, p->next,
		    p->id, p->committed);
	metrics_family(b, "stopcock_kafka_partition_lag", "gauge",
	    "Messages behind the partition's high watermark (NaN: unknown).");
	KAFKA_EACH(k, p, i) {
		if (rd_kafka_get_watermark_offsets(k->rk, k->topic, p->id,
		    &lo, &hi) == 0 && hi >= 0)
			evbuffer_add_printf(b, "stopcock_kafka_partition_lag{"
			    "partition=\"%" PRId32 "\"} %" PRId64 "\n", p->id,
			    hi - (p->next >= 0 ? p->next : lo));
		else
			evbuffer_add_printf(b, "stopcock_kafka_partition_lag{"
			    "partition=\"%" PRId32 "\"} NaN\n", p->id);
	}
	metrics_counter(b, "stopcock_kafka_rebalances_total",
	    "Rebalance callbacks (assign or revoke).", k->rebalances);
	metrics_counter(b, "stopcock_kafka_assigned_total",
	    "Partitions assigned to this daemon.", k->assigned);
	metrics_counter(b, "stopcock_kafka_revoked_total",
	    "Partitions revoked or lost.", k->revoked);
	metrics_counter(b, "stopcock_kafka_lost_total",
	    "Rebalances in which the partitions were lost, not revoked.",
	    k->lost);
	metrics_counter(b, "stopcock_kafka_fenced_total",
	    "Partitions whose transactional id another daemon took over.",
	    k->fenced);
	metrics_family(b, "stopcock_kafka_refused_total", "counter",
	    "Assigned partitions refused, by reason.");
	for (r = 0; r < KR_N; r++)
		evbuffer_add_printf(b, "stopcock_kafka_refused_total{reason="
		    "\"%s\"} %" PRIu64 "\n", kafka_refusal_names[r],
		    k->refused[r]);
	metrics_counter(b, "stopcock_kafka_errors_total",
	    "Consumer and client errors.", k->consume_errors);
	KAFKA_EACH(k, p, i)
		if (p->eng != NULL)
			stray += p->stray;
	metrics_gauge(b, "stopcock_kafka_stray_experiments",
	    "Experiments of the partitions' engines that no message key of "
	    "their partition names (records sent under another experiment's "
	    "key), at the last commit: kept, but split if they travel in "
	    "several partitions.",
	    (double)stray);
}
