/*
 * daemon.h: the shells of stopcockd around the pure engine. One struct
 * daemon owns everything (no globals beyond the logger); each subsystem
 * is one file with a prefix matching its name and an opaque struct the
 * daemon owns:
 *
 *   main.c      options, start-up, signals, the loop        (daemon_*)
 *   ingest.c    one line from any source -> proto -> engine (ingest_*)
 *   listen.c    TCP, UDP and Unix stream listeners          (listen_*)
 *   redis_in.c  the Redis stream consumer (hiredis async)    (redis_in_*)
 *   redis_house.c  its housekeeping: acks, dead letters, reclaiming,
 *               lag (redis_house_*; shares redis_in_int.h)
 *   redis_lease.c  one consumer per group by a lease in Redis; under
 *               [redis] ha the fenced reads and the checkpoint in Redis
 *               (redis_lease_*; shares redis_in_int.h); redis_in_sid.c
 *               stream entry IDs (redis_in_sid_*)
 *   kafka_in.c  the Kafka consumer: partitions, rebalances (kafka_in_*);
 *               kafka_state.c: each partition's state and offset in
 *               one transaction, read back on assignment (kafka_state_*;
 *               shares kafka_in_int.h) (librdkafka)
 *   engines.c   the daemon's engines: d->engine and one per owned Kafka
 *               partition, seen as one by the API, metrics, tick (engines_*)
 *   ckpt.c      checkpoint write/restore, atomic and checksummed,
 *               written by a forked child off the loop (ckpt_*)
 *   notify.c    systemd notifications that never block  (notify_*)
 *   dispatch.c  the engine's sink: findings queued, then drained on
 *               the loop to pause, alert and webhooks    (dispatch_*)
 *   alert.c     findings -> alerts: identity, lifecycle, severity,
 *               routing, syslog (alert_*)
 *   alert_text.c  an alert's summary and syslog fields (alert_text_*)
 *   alert_journal.c  alert events on disk before they are sent
 *                 (alert_journal_*)
 *   alert_carry.c  an alert's saved form, and its travel with a Kafka
 *                 partition (alert_carry_*)
 *   alertmgr.c  alerts in the Alertmanager API's form (alertmgr_*)
 *   webhook.c   signed webhooks over libcurl multi, spooled (webhook_*)
 *   pause.c     auto-pause: rules, audit log, HTTP + Redis delivery (pause_*)
 *   http.c      JSON API, /metrics and the page (libevent http) (http_*)
 *
 * Data flows one way: inputs -> ingest -> engine -> (sink) dispatch ->
 * pause policy -> alert (syslog) -> webhook / pause delivery. The HTTP
 * server only reads state, except the authenticated POST actions that go
 * through the same engine calls.
 */
#ifndef STOPCOCK_DAEMON_H
#define STOPCOCK_DAEMON_H

#include <stdint.h>

#include <event2/buffer.h>
#include <event2/event.h>
#include <jansson.h>

#include "stopcock/conf.h"
#include "stopcock/engine.h"
#include "stopcock/proto.h"
#include "stopcock/util.h"

enum source {
	SRC_TCP, SRC_UDP, SRC_UNIX, SRC_REDIS, SRC_HTTP, SRC_KAFKA, SRC_N
};

struct daemon_main;
struct ingest;
struct listen;
struct redis_in;
struct kafka_in;
struct dispatch;
struct alert;
struct webhook;
struct pause;
struct http;
struct notify;
struct ckpt;
struct auth;
struct frame;
struct engines;

/*
 * d->conf is replaced on SIGHUP (all-or-nothing). Read it afresh in each
 * callback and never keep pointers into it: the old one is freed right
 * after the swap. What must stay fixed until restart (listen addresses,
 * the state directory, the Redis stream) is copied at start.
 */

struct ingest_counters {
	uint64_t	records[SRC_N];		/* applied */
	uint64_t	lines[SRC_N];		/* read, including skipped */
	uint64_t	bytes[SRC_N];
	uint64_t	proto_rejected[SRC_N][PROTO_NSTATUS];
	uint64_t	engine_rejected[SRC_N][ENGINE_NREJECT];
	uint64_t	unsigned_records[SRC_N];	/* applied, not in a
							 * signed batch */
};

enum ingest_status {
	INGEST_OK,		/* applied */
	INGEST_SKIP,		/* blank or comment line */
	INGEST_BAD_LINE,	/* the protocol refused it: garbage */
	INGEST_REFUSED		/* parsed, but the engine refused it */
};

struct daemon {
	struct event_base	*base;
	struct conf		*conf;		/* owned; swapped on reload */
	struct engine		*engine;		/* sockets, Redis, plans */
	struct engines		*engines;	/* + each partition's */
	uint8_t			 hashkey[16];

	struct daemon_main	*main;		/* main.c's own: the loop */
	struct ingest		*ingest;
	struct listen		*listen;
	struct redis_in		*redis;
	struct kafka_in		*kafka;
	struct dispatch		*dispatch;
	struct alert		*alert;
	struct webhook		*webhook;
	struct pause		*pause;
	struct http		*http;
	struct notify		*notify;	/* NULL: not under systemd */
	struct ckpt		*ckpt;		/* ckpt.c's writer child */
	struct auth		*auth;		/* producers, signed batches */

	double			 started;	/* wall time */
	double			 last_checkpoint;	/* wall time, 0 never */
	uint64_t		 checkpoints;
	int			 draining;	/* SIGTERM seen */
	int			 log_stderr;	/* -f or -d: the log on stderr */

	/* Fixed at start; see the comment on d->conf. */
	char			*state_dir;
	char			*restored_redis_id;	/* checkpoint's */
	char			*restored_redis_stream;
};

const char	*source_name(enum source);
double		 daemon_now(void);	/* wall clock, seconds */
/* Number of record inputs configured (tcp, udp, unix, redis, kafka). */
void		 daemon_engine_replace(struct daemon *, struct engine *e);
int		 daemon_inputs(const struct conf *);

/* engines.c: every engine of the daemon, index 0 d->engine, then the
 * Kafka partitions' (added and removed by kafka_in.c, which owns them).
 * for (i = 0; (e = engines_at(d, i)) != NULL; i++) sees them all. */
struct engines	*engines_new(void);
void		 engines_free(struct engines *);
/* e's findings go to the sink from now on. */
void		 engines_add(struct daemon *, struct engine *e);
/* Drains the sink's queue first; the caller frees e. */
void		 engines_remove(struct daemon *, struct engine *e);
struct engine	*engines_at(struct daemon *, size_t i);
/* The engine holding the experiment, NULL when none does. */
struct engine	*engines_find(struct daemon *, const char *experiment);
/* engine_json_list's shape over all engines. */
json_t		*engines_json_list(struct daemon *);
void		 engines_counters(struct daemon *, struct engine_counters *);
void		 engines_tick(struct daemon *, double now);
int		 engines_reconfigure(struct daemon *, const struct conf *,
		    char **cause);
/* An operator action changed e: its partition commits it. */
void		 engines_touched(struct daemon *, struct engine *e);

/* ingest.c: its counters, rejection log budget and event numbers. */
struct ingest	*ingest_new(void);
void		 ingest_free(struct ingest *);
/* The counters (they were d->counters): inputs add what they refuse
 * before a line exists, e.g. an oversized message. */
struct ingest_counters *ingest_counters(struct daemon *);
/* Every input hands complete lines here. 0 applied or skipped,
 * -1 rejected (counted and, for the first few, logged). */
int		 ingest_line(struct daemon *, enum source, const char *line,
		    size_t len);
/* The same, telling garbage (which may get a client cut off) from
 * records the engine refused (unplanned experiment, caps...). */
enum ingest_status ingest_line_status(struct daemon *, enum source,
		    const char *line, size_t len);
/* Count (and maybe log) a line refused before parsing, e.g. too_long;
 * sample is a prefix of it for the log, may be NULL. */
void		 ingest_reject(struct daemon *, enum source, enum proto_status,
		    size_t len, const char *sample, size_t samplelen);
/* Several lines in one block (a datagram, a Redis entry). */
void		 ingest_lines(struct daemon *, enum source, const char *,
		    size_t);
/* The same for the body of a verified batch (auth.c): its records are
 * authenticated, so trusted. Returns the records applied. */
uint64_t	 ingest_lines_signed(struct daemon *, enum source,
		    const char *, size_t);
/* The same into engine e rather than d->engine (a Kafka partition's). */
void		 ingest_lines_into(struct daemon *, struct engine *e,
		    enum source, const char *, size_t);
/* Where ingested lines go (NULL: d->engine); returns the previous. */
struct engine	*ingest_into(struct daemon *, struct engine *);
void		 ingest_metrics(struct daemon *, struct evbuffer *);
/* The counters as JSON (kept in the checkpoint) and back. */
json_t		*ingest_json(struct daemon *);
void		 ingest_restore(struct daemon *, const json_t *);
uint64_t	 ingest_records_total(struct daemon *);

/* auth.c: producers, signed batches, trust of inputs. */
enum auth_reason {
	AUTH_BAD_SIGNATURE, AUTH_UNKNOWN_PRODUCER, AUTH_STALE, AUTH_REPLAYED,
	AUTH_MALFORMED, AUTH_UNSIGNED, AUTH_NREASON
};
struct auth	*auth_new(struct daemon *, char **cause);
void		 auth_free(struct auth *);
/* New producers and secrets on reload (ids and floors kept); all or
 * nothing: 0, or -1 with *cause and nothing changed. */
int		 auth_configure(struct auth *, const struct conf *,
		    char **cause);
const char	*auth_reason(enum auth_reason);
/* Does the input require signed batches; may auto-pause act on its
 * records (signed, or trusted by the configuration)? */
int		 auth_signed(const struct conf *, enum source);
int		 auth_trusted(const struct conf *, enum source);
/* Count and log (rate-limited) one refused batch; f may be NULL. */
void		 auth_refuse(struct daemon *, enum source, enum auth_reason,
		    const struct frame *f, size_t bytes);
/* Verify a parsed frame and its body; 0 applied, -1 refused (counted). */
int		 auth_batch(struct daemon *, enum source, const struct frame *,
		    const char *body);
/* A Redis entry's or Kafka message's fields beside its records: any of
 * them NULL when absent (all absent: unsigned). 0 or -1, as above. */
int		 auth_fields(struct daemon *, enum source, const char *producer,
		    size_t, const char *id, size_t, const char *ts, size_t,
		    const char *sig, size_t, const char *body, size_t len);
/* One datagram holding exactly one frame. */
int		 auth_datagram(struct daemon *, enum source, const char *,
		    size_t);
void		 auth_metrics(struct daemon *, struct evbuffer *);
json_t		*auth_json(struct daemon *);
void		 auth_restore(struct daemon *, const json_t *);

/* metrics.c: Prometheus text exposition format helpers. */
void		 metrics_family(struct evbuffer *, const char *name,
		    const char *type, const char *help);
void		 metrics_counter(struct evbuffer *, const char *name,
		    const char *help, uint64_t);
void		 metrics_gauge(struct evbuffer *, const char *name,
		    const char *help, double);
/* One label, its value escaped; first: no comma before it. */
void		 metrics_label(struct evbuffer *, const char *key,
		    const char *value, int first);

/* retire.c: archive experiment id's final state in the state directory
 * and let the engine forget it; *path: the archive (caller frees). */
int		 retire_experiment(struct daemon *, const char *id,
		    const char *why, char **path, char **cause);
/* On the tick: retire experiments idle for [defaults] retire_idle. */
void		 retire_idle(struct daemon *);

/* durable.c: whole-or-nothing files (tmp, fsync, rename, fsync dir). */
int		 durable_write(const char *dir, const char *path,
		    const char *const *parts, const size_t *lens, int nparts,
		    int mode, char **cause);
int		 durable_mkdirs(const char *path, int mode, char **cause);

/* ckpt.c: ckpt_start forks a writer and returns at once (the loop
 * never waits for the disk); ckpt_write writes in the process itself
 * (shutdown), after any writer ended; ckpt_free waits for one. */
void		 ckpt_start(struct daemon *, const char *why);
int		 ckpt_write(struct daemon *, char **cause);
void		 ckpt_free(struct daemon *);
int		 ckpt_restore(struct daemon *, char **cause);
/* Replace the running daemon's state (engine, alerts, counters, Redis
 * position in d->restored_redis_id) with a checkpoint image, all or
 * nothing: a standby taking over from the checkpoint in Redis. */
int		 ckpt_adopt(struct daemon *, const char *image, size_t len,
		    char **cause);

/* listen.c */
struct listen	*listen_new(struct daemon *, char **cause);
void		 listen_free(struct listen *);
void		 listen_metrics(struct listen *, struct evbuffer *);
json_t		*listen_json(struct listen *);
/* Shutdown: stop accepting, read what the kernel already holds for each
 * client and the UDP socket, apply it, close every client. */
void		 listen_drain(struct listen *);

/* redis_in.c: last_id is the last entry applied (restored from the
 * checkpoint); redis_in_covered() is called after each checkpoint, with
 * the last ID it holds, so the
 * consumer may XACK what it covers. */
struct redis_in	*redis_in_new(struct daemon *, const char *last_id,
		    char **cause);
void		 redis_in_free(struct redis_in *);
const char	*redis_in_last_id(struct redis_in *);
void		 redis_in_covered(struct redis_in *, const char *last_id);
/* The consumer's lease (redis_lease.c); NULL without a consumer. */
struct redis_lease *redis_in_lease(struct redis_in *);
/* Shutdown: drop the connection and stop reconnecting. Delivered but
 * unapplied entries stay pending in Redis for the next start. */
void		 redis_in_stop(struct redis_in *);
/* Entries not yet delivered to the group, -1 when unknown. */
int64_t		 redis_in_lag(struct redis_in *);
void		 redis_in_metrics(struct redis_in *, struct evbuffer *);
json_t		*redis_in_json(struct redis_in *);

/* redis_lease.c, what the rest of the daemon asks of the lease; each
 * takes NULL (no Redis input) as "no lease". [redis] ha: the checkpoint
 * goes to Redis under the lease. */
struct redis_lease;
int		 redis_lease_ha(const struct redis_lease *);
/* A checkpoint (periodic, final) or an idle retirement is this daemon's
 * to make: not a standby under ha. */
int		 redis_lease_may_checkpoint(const struct redis_lease *);
/* Store a checkpoint image in Redis under the lease (synchronous: the
 * writer child, or shutdown, which also gives the lease up). 0 stored,
 * 1 refused (another daemon holds the lease), -1 failed. */
int		 redis_lease_store(struct redis_lease *, const char *const *,
		    const size_t *, int nparts, int release, char **cause);
/* A checkpoint Redis refused (the writer's outcome, in the parent). */
void		 redis_lease_fenced(struct redis_lease *);

/* dispatch.c: the engine's sink. dispatch_finding only queues; the
 * queue drains on the loop, or now with dispatch_drain (before the alert
 * state is read or saved). */
struct dispatch	*dispatch_new(struct daemon *);
void		 dispatch_free(struct dispatch *);
void		 dispatch_finding(void *dispatch, const struct finding *);
void		 dispatch_drain(struct dispatch *);
void		 dispatch_metrics(struct dispatch *, struct evbuffer *);

/* kafka_in.c: the consumer of [kafka] topic. kafka_in_stop (shutdown)
 * commits every owned partition's state and offset, then leaves. */
struct kafka_in	*kafka_in_new(struct daemon *, char **cause);
void		 kafka_in_free(struct kafka_in *);
void		 kafka_in_stop(struct kafka_in *);
void		 kafka_in_metrics(struct kafka_in *, struct evbuffer *);
/* {"topic", "group", "partitions": [{"partition", "state", "read",
 *  "committed", "experiments": [ID...]}]}: what this daemon owns. */
json_t		*kafka_in_json(struct kafka_in *);
/* e, a partition's engine, changed outside a message: commit it. */
void		 kafka_in_touched(struct kafka_in *, struct engine *e);
/* An operator's action on an alert of the experiment: the partition that
 * holds it commits its state now. 0 done (or no partition holds it), -1
 * failed (committed again at the next commit). */
int		 kafka_state_commit_of(struct kafka_in *,
		    const char *experiment);

/* alert.c */
enum alert_kind {
	ALERT_HARM,
	ALERT_SAFE,
	ALERT_SRM,
	ALERT_UNTRUSTED,
	ALERT_PAUSE,
	ALERT_PAUSE_DRY_RUN,
	ALERT_NKINDS
};

struct alert	*alert_new(struct daemon *, char **cause);
void		 alert_free(struct alert *);
/* Raise the alert of this kind for f (reason: the pause's, may be NULL)
 * and send it to every output that chose its kind. 1 when raised, 0
 * when it was raised before (never page twice) or is not news (a safe
 * verdict under SRM). */
int		 alert_raise(struct alert *, enum alert_kind,
		    const struct finding *, const char *reason);
/* Each of these resolves alerts (a "resolved" event to the outputs):
 * a new epoch the earlier epochs' alerts, a pause the experiment's
 * alerts but the pause's own, a reset all of them. */
void		 alert_epoch(struct alert *, const char *experiment,
		    uint32_t epoch);
void		 alert_paused(struct alert *, const char *experiment);
void		 alert_experiment_reset(struct alert *, const char *experiment);
/* Every open alert of the experiment, resolution `why` (retire calls it
 * with "retired"). */
void		 alert_experiment_resolve(struct alert *,
		    const char *experiment, const char *why);
/* An operator acknowledges (reminders stop) or closes (resolves) the
 * experiment's alerts, of one guardrail and variant when not NULL. */
int		 alert_ack(struct alert *, const char *experiment,
		    const char *guardrail, const char *variant, char **cause);
int		 alert_close(struct alert *, const char *experiment,
		    const char *guardrail, const char *variant, char **cause);
json_t		*alert_save(struct alert *);
int		 alert_restore(struct alert *, const json_t *, char **cause);
int		 alert_start_journal(struct alert *, const char *dir,
		    char **cause);
uint64_t	 alert_journal_seq(const struct alert *);
void		 alert_journal_done(struct alert *, uint64_t seq);
json_t		*alert_json(struct alert *);	/* raised alerts */
/* alert_carry.c: the alerts of experiments mine() accepts, as a Kafka
 * partition's state carries them; taking such a list over (the further
 * life of an alert wins, ids kept; the number taken); and forgetting
 * them when the partition leaves (the number forgotten). */
json_t		*alert_carry(struct alert *,
		    int (*mine)(void *, const char *experiment), void *arg);
size_t		 alert_carry_adopt(struct alert *, const json_t *carried);
size_t		 alert_carry_forget(struct alert *,
		    int (*mine)(void *, const char *experiment), void *arg);
void		 alert_metrics(struct alert *, struct evbuffer *);
/* News that is no alert (kind: CONF_KIND_RESTARTED or _RETIRED) to the
 * syslog alert lines, when [syslog] kinds names it. */
void		 alert_news(struct alert *, uint32_t kind, const char *fields,
		    const char *id);

/* alertmgr.c: what an Alertmanager is told of one alert. */
struct alert_view {
	const char	*id, *kind, *severity, *experiment, *guardrail;
	const char	*variant;	/* "" for SRM */
	const char	*summary, *link, *runbook;	/* link, runbook: NULL */
	uint32_t	 epoch;
	double		 starts;	/* wall time it was raised */
	int		 acked;
};
/* POST the alert, ending at `ends` (wall time: ahead while it holds,
 * its resolution once resolved), to [alertmanager] url. */
void		 alertmgr_post(struct daemon *, const struct alert_view *,
		    double ends);
#define WEBHOOK_ALERTMANAGER "@alertmanager"

/* webhook.c */
struct webhook	*webhook_new(struct daemon *, char **cause);
void		 webhook_free(struct webhook *);
/* Queue body (not stolen) for every receiver whose kinds hold every bit
 * of `need` (enum conf_kind); id is the stable webhook-id. */
void		 webhook_send(struct webhook *, uint32_t need, const char *id,
		    json_t *body);
/* Queue body for one receiver by name (pause.c posts to WEBHOOK_PAUSE,
 * the internal receiver built from [pause] url/secret). -1 if unknown. */
#define WEBHOOK_PAUSE "@pause"
int		 webhook_post(struct webhook *, const char *receiver,
		    const char *id, json_t *body);
void		 webhook_metrics(struct webhook *, struct evbuffer *);
/* Deliveries not yet answered about experiments mine() accepts, as a
 * Kafka partition's state carries them; webhook_adopt queues such a
 * list here (same webhook-ids, none twice). */
json_t		*webhook_pending(struct webhook *,
		    int (*mine)(void *, const char *experiment), void *arg);
size_t		 webhook_adopt(struct webhook *, const json_t *pending);

/* pause.c: the policy and the delivery of auto-pauses. */
enum pause_decision {
	PAUSE_NONE,		/* not for the policy (SRM, pause_on_srm off) */
	PAUSE_PAUSED,
	PAUSE_DRY_RUN,
	PAUSE_REFUSED_UNTRUSTED,
	PAUSE_REFUSED_REPEAT,
	PAUSE_REFUSED_RATE,
	PAUSE_REFUSED_UNTRUSTED_INPUT,	/* evidence from untrusted inputs */
	PAUSE_NDECISIONS
};

struct pause	*pause_new(struct daemon *, char **cause);
void		 pause_free(struct pause *);
/* Decide on a FINDING_PAUSE or an established SRM; every decision but
 * PAUSE_NONE is audited and *reason set (free it). */
enum pause_decision pause_decide(struct pause *, const struct finding *,
		    char **reason);
/* Deliver a PAUSE_PAUSED: HTTP (spooled, signed), Redis SET + PUBLISH. */
void		 pause_deliver(struct pause *, const struct finding *,
		    const char *reason);
void		 pause_metrics(struct pause *, struct evbuffer *);
/* SIGHUP: the audit log reopened by name (log rotation). */
void		 pause_reopen(struct pause *);
/* The once-per-epoch marks and this hour's pause times of experiments
 * mine() accepts (a Kafka partition's state), and taking them over. */
json_t		*pause_carry(struct pause *,
		    int (*mine)(void *, const char *experiment), void *arg);
void		 pause_adopt(struct pause *, const json_t *carried);

/* http.c */
struct http	*http_new(struct daemon *, char **cause);
void		 http_free(struct http *);

/* notify.c: systemd notifications that never block the loop. */
struct notify	*notify_new(void);
void		 notify_free(struct notify *);
void		 notify_send(struct notify *, const char *fmt, ...)
		    SC_PRINTF(2, 3);
/* READY=1 again if the socket refused it (status timer). */
void		 notify_retry(struct notify *);

#endif
