/*
 * conf_table.c: the option table (after tmux's options-table.c). Each row
 * names a key with its section, type, field, range, default and help
 * line; this file also knows each type: how a value is parsed and
 * checked, and how its range reads in errors and in conf_help. conf.c
 * walks the same table to parse files, apply defaults, copy and free.
 */
#include <math.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include "stopcock/addr.h"
#include "stopcock/conf.h"
#include "stopcock/log.h"
#include "stopcock/proto.h"
#include "stopcock/util.h"

#include "conf_int.h"

#define CONF_UNIX_PATH_MAX 107		/* sun_path holds 108 with the NUL */
#define CONF_STRING_MAX 1024
#define CONF_IDENT_MAX 48		/* RFC 5424 APP-NAME */
#define CONF_TOPIC_MAX 249		/* Kafka's limit on a topic name */
#define CONF_KINDS_WORDS_MAX 160	/* "words of" and every kind word */

_Static_assert(sizeof(enum conf_test) == sizeof(int), "enum stored as int");
_Static_assert(sizeof(enum conf_harm) == sizeof(int), "enum stored as int");
_Static_assert(sizeof(enum conf_action) == sizeof(int), "enum stored as int");

const struct conf_section_info conf_sections[S_COUNT] = {
	[S_DEFAULTS] = { "defaults", 0 },
	[S_GUARDRAIL] = { "guardrail", 1 },
	[S_EXPERIMENT] = { "experiment", 1 },
	[S_DAEMON] = { "daemon", 0 },
	[S_REDIS] = { "redis", 0 },
	[S_KAFKA] = { "kafka", 0 },
	[S_ALERTS] = { "alerts", 0 },
	[S_PAUSE] = { "pause", 0 },
	[S_SYSLOG] = { "syslog", 0 },
	[S_WEBHOOK] = { "webhook", 1 },
	[S_ALERTMANAGER] = { "alertmanager", 0 },
	[S_PRODUCER] = { "producer", 1 },
};

const char *const conf_kind_names[] = {
	"harm", "safe", "srm", "pause", "pause_dry_run", "reminder",
	"acknowledged", "resolved", "restarted", "retired", NULL
};
/*
 * Alertmanager takes alerts, which fire and resolve; a restarted test
 * or a retired experiment is news, not an alert, so its [alertmanager]
 * kinds stop before the last two words (bit i is still word i).
 */
static const char *const conf_am_kind_names[] = {
	"harm", "safe", "srm", "pause", "pause_dry_run", "reminder",
	"acknowledged", "resolved", NULL
};
#define CONF_AM_KINDS_DEFAULT "harm srm pause pause_dry_run reminder " \
	"acknowledged resolved"
#define CONF_KINDS_DEFAULT CONF_AM_KINDS_DEFAULT " restarted retired"


const char *const conf_tests[] = {
	"mean", "proportion", "rate", "quantile", NULL
};
static const char *const conf_harms[] = { "increase", "decrease", NULL };
static const char *const conf_actions[] = { "alert", "pause", NULL };
static const char *const conf_redis_starts[] = { "end", "beginning", NULL };

#define C(f) offsetof(struct conf, f)
#define G(f) offsetof(struct conf_guardrail, f)
#define E(f) offsetof(struct conf_experiment, f)
#define W(f) offsetof(struct conf_webhook, f)
#define P(f) offsetof(struct conf_producer, f)

const struct conf_option conf_options[] = {
	{ S_DEFAULTS, "alpha", T_DOUBLE, C(alpha), 0, 0.5, F_OPEN_MIN,
	  "0.05", NULL, "false-alarm budget per experiment, shared by its "
	  "guardrail tests" },
	{ S_DEFAULTS, "srm_alpha", T_DOUBLE, C(srm_alpha), 0, 0.5, F_OPEN_MIN,
	  "0.001", NULL, "false-alarm budget of the sample ratio mismatch "
	  "check" },
	{ S_DEFAULTS, "plan_units", T_DOUBLE, C(plan_units), 1, 1e12, 0,
	  "10000", NULL, "planned units per arm; tunes every test's mixture" },
	{ S_DEFAULTS, "rate_concentration", T_DOUBLE, C(rate_concentration),
	  0, 1e12, F_OPEN_MIN | F_ZERO_OK, "0", NULL,
	  "mixture concentration of rate tests; 0 uses 100" },
	{ S_DEFAULTS, "sketch_accuracy", T_DOUBLE, C(sketch_accuracy),
	  0.0001, 0.5, 0, "0.01", NULL,
	  "relative accuracy of the quantile sketches" },
	{ S_DEFAULTS, "sketch_buckets", T_U32, C(sketch_buckets), 16, 4096, 0,
	  "512", NULL, "bucket cap per quantile sketch (bounds memory)" },
	{ S_DEFAULTS, "history_points", T_U32, C(history_points), 8, 2000, 0,
	  "120", NULL, "chart points kept per test" },
	{ S_DEFAULTS, "tick_budget", T_U32, C(tick_budget), 0, 100000000,
	  F_ZERO_OK, "500", NULL, "costly test looks per tick, taken in turn "
	  "across experiments (bounds a tick's time); 0: no limit" },
	{ S_DEFAULTS, "lateness", T_DURATION, C(lateness), 0, 86400,
	  F_ZERO_OK, "30s", NULL, "how far behind the newest exposure of an "
	  "experiment (in record time) an exposure may arrive and still "
	  "count in the SRM test; later ones are counted as late" },
	{ S_DEFAULTS, "epoch_grace", T_DURATION, C(epoch_grace), 0, 86400,
	  F_ZERO_OK, "10m", NULL, "after a ramp step, how long (in the "
	  "daemon's clock) records naming the previous epoch with epoch= "
	  "still count in it; later ones are refused and counted; 0: none" },
	{ S_DEFAULTS, "srm_interval", T_DURATION, C(srm_interval), 0.001,
	  3600, 0, "5s", NULL, "the SRM test adds exposures one complete "
	  "interval of record time at a time, so arrival order inside an "
	  "interval cannot move it" },
	{ S_DEFAULTS, "detect_arl", T_DURATION, C(detect_arl), 3600, 1e12,
	  0, "600d", NULL, "change detection: the average record time "
	  "between false alarms of one experiment's detectors (600d: 0.05 "
	  "expected in 30 days); shorter finds late harm sooner" },
	{ S_DEFAULTS, "unit_groups", T_U32, C(unit_groups), 16,
	  CONF_UNIT_GROUPS_MAX, 0,
	  "256", NULL, "random groups per arm and metric for the variance "
	  "of records that name their unit (unit=); memory 16 bytes each" },
	{ S_DEFAULTS, "retire_idle", T_DURATION, C(retire_idle), 1,
	  3660 * 86400.0, F_ZERO_OK, "0", NULL, "retire an experiment that no "
	  "record reached for this long (stopcockd: archived in the state "
	  "directory, its slot freed); 0: never" },
	{ S_DEFAULTS, "declared_only", T_BOOL, C(declared_only), 0, 0, 0, "no",
	  NULL, "plan records from the inputs may only plan experiments "
	  "this file declares ([experiment ID]); others are refused and "
	  "counted (undeclared). The HTTP plan action is not bound by it" },
	{ S_DEFAULTS, "max_experiments", T_U32, C(max_experiments), 1, 1e6, 0,
	  "10000", NULL, "experiments tracked at once; records beyond are "
	  "refused and counted" },
	{ S_DEFAULTS, "max_variants", T_U32, C(max_variants), 2,
	  PROTO_PLAN_MAX, 0, "8", NULL, "arms in one experiment's plan" },
	{ S_DEFAULTS, "max_metrics", T_U32, C(max_metrics), 1, 1024, 0,
	  "16", NULL, "metrics tracked per experiment" },

	{ S_DAEMON, "tcp", T_HOSTPORT, C(tcp), 0, 0, 0, NULL, NULL,
	  "listen for records over TCP; unset: no TCP listener" },
	{ S_DAEMON, "udp", T_HOSTPORT, C(udp), 0, 0, 0, NULL, NULL,
	  "listen for records as UDP datagrams; unset: none" },
	{ S_DAEMON, "unix", T_PATH, C(unix_path), 0, CONF_UNIX_PATH_MAX, 0,
	  NULL, NULL, "listen for records on a unix stream socket" },
	{ S_DAEMON, "http", T_HOSTPORT, C(http), 0, 0, 0, NULL, NULL,
	  "HTTP API, status pages and metrics; unset: none" },
	{ S_DAEMON, "state", T_STRING, C(state_dir), 0, CONF_STRING_MAX, 0,
	  "/var/lib/stopcock", NULL, "directory for checkpoints" },
	{ S_DAEMON, "tick", T_DURATION, C(tick), 0.01, 3600, 0, "1s", NULL,
	  "how often tests are re-evaluated" },
	{ S_DAEMON, "checkpoint_every", T_DURATION, C(checkpoint_every),
	  0.01, 86400, 0, "5s", NULL, "how often state is written to disk" },
	{ S_DAEMON, "max_clients", T_U32, C(max_clients), 1, 100000, 0,
	  "256", NULL, "stream connections (TCP and unix) accepted at once; "
	  "at the cap, a connection on an input holding less than its share "
	  "closes the longest-idle client of the other input" },
	{ S_DAEMON, "max_clients_per_source", T_U32,
	  C(max_clients_per_source), 1, 100000, 0, "64", NULL,
	  "stream connections at once from one source (TCP: an IPv4 address "
	  "or an IPv6 /64; unix: a user id); more are refused and counted" },
	{ S_DAEMON, "client_idle_timeout", T_DURATION, C(client_idle_timeout),
	  0.1, 86400, F_ZERO_OK, "300s", NULL, "close a stream client that "
	  "sent nothing for this long (counted, logged); 0: never" },
	{ S_DAEMON, "client_line_timeout", T_DURATION, C(client_line_timeout),
	  0.1, 86400, F_ZERO_OK, "10s", NULL, "close a stream client whose "
	  "line has not ended (newline) this long after its first byte: "
	  "slow senders (counted, logged); 0: never" },
	{ S_DAEMON, "client_buffer", T_U32, C(client_buffer), 4096,
	  1 << 30, 0, "1048576", NULL, "bytes buffered per client before "
	  "reading pauses" },
	{ S_DAEMON, "http_token", T_TOKEN, C(http_token), 16, 1024, 0, NULL,
	  NULL, "bearer token for POST requests; unset: POST is refused" },
	{ S_DAEMON, "tcp_signed", T_BOOL, C(tcp_signed), 0, 0, 0, "no", NULL,
	  "TCP clients must send signed batches of a [producer]; anything "
	  "else is refused and counted" },
	{ S_DAEMON, "udp_signed", T_BOOL, C(udp_signed), 0, 0, 0, "no", NULL,
	  "each UDP datagram must be one signed batch" },
	{ S_DAEMON, "unix_signed", T_BOOL, C(unix_signed), 0, 0, 0, "no",
	  NULL, "unix socket clients must send signed batches" },
	{ S_DAEMON, "tcp_trusted", T_BOOL, C(tcp_trusted), 0, 0, 0, "no",
	  NULL, "auto-pause may act on unsigned TCP records (anyone who "
	  "reaches the port could write them); signed ones always count" },
	{ S_DAEMON, "udp_trusted", T_BOOL, C(udp_trusted), 0, 0, 0, "no",
	  NULL, "auto-pause may act on unsigned UDP records" },
	{ S_DAEMON, "unix_trusted", T_BOOL, C(unix_trusted), 0, 0, 0, "yes",
	  NULL, "auto-pause may act on unsigned unix socket records (the "
	  "socket's mode and group say who may write)" },
	{ S_DAEMON, "signature_tolerance", T_DURATION,
	  C(signature_tolerance), 1, 86400, 0, "5m", NULL, "a signed "
	  "batch stamped further than this from the daemon's clock is "
	  "refused (stale_timestamp)" },
	{ S_DAEMON, "unix_mode", T_MODE, C(unix_mode), 0, 0777, 0, "0660",
	  NULL, "permission bits of the unix socket, octal, set at bind" },
	{ S_DAEMON, "unix_group", T_WORD, C(unix_group), 0, 256, 0, NULL,
	  NULL, "group owning the unix socket (a name or a number); unset: "
	  "the daemon's" },
	{ S_DAEMON, "public_url", T_URL, C(public_url), 0, 0, 0,
	  "http://127.0.0.1:7721", NULL, "base of the links in alerts" },

	{ S_REDIS, "address", T_ADDRESS, C(redis_address), 0, 0, 0, NULL,
	  NULL, "Redis server (host:port or socket path); unset: no Redis "
	  "input" },
	{ S_REDIS, "stream", T_WORD, C(redis_stream), 0, CONF_STRING_MAX, 0,
	  "stopcock:events", NULL, "stream the records arrive on" },
	{ S_REDIS, "group", T_WORD, C(redis_group), 0, CONF_STRING_MAX, 0,
	  "stopcock", NULL, "consumer group" },
	{ S_REDIS, "consumer", T_TEMPLATE, C(redis_consumer), 0,
	  CONF_STRING_MAX, 0, "%h", "h", "consumer name; %h is the host "
	  "name" },
	{ S_REDIS, "dead_letter", T_WORD, C(redis_dead_letter), 0,
	  CONF_STRING_MAX, 0, "stopcock:dead", NULL,
	  "stream for entries the daemon could not apply (no records field, "
	  "or max_deliveries deaths while applying them)" },
	{ S_REDIS, "max_deliveries", T_U32, C(redis_max_deliveries), 1, 1000,
	  0, "5", NULL, "times the daemon may die while applying an entry "
	  "(counted by the daemon itself, not Redis's delivery count) before "
	  "the entry is dead-lettered" },
	{ S_REDIS, "claim_idle", T_DURATION, C(redis_claim_idle), 1, 86400,
	  0, "60s", NULL, "claim other consumers' pending entries idle this "
	  "long (never the daemon's own)" },
	{ S_REDIS, "batch", T_U32, C(redis_batch), 1, 100000, 0, "256", NULL,
	  "entries per read" },
	{ S_REDIS, "block", T_DURATION, C(redis_block), 0.01, 300, 0, "2s",
	  NULL, "how long one read waits for entries" },
	{ S_REDIS, "start", T_ENUM, C(redis_start), 0, 0, 0, "end",
	  conf_redis_starts, "where a new consumer group starts: end (entries "
	  "already in the stream are skipped, and counted in the log) or "
	  "beginning (all of them are applied); a group lost after it was "
	  "made is made again after the last checkpointed entry" },
	{ S_REDIS, "ha", T_BOOL, C(redis_ha), 0, 0, 0, "no", NULL,
	  "several daemons share the stream: the one holding the lease "
	  "consumes, the others stand by; the checkpoint is kept in Redis "
	  "(state_key) so a standby takes over from it" },
	{ S_REDIS, "lease_key", T_WORD, C(redis_lease_key), 0,
	  CONF_STRING_MAX, 0, NULL, NULL, "key of the lease that lets one "
	  "daemon consume the group; unset: <stream>:<group>:lease" },
	{ S_REDIS, "lease_ttl", T_DURATION, C(redis_lease_ttl), 1, 300, 0,
	  "10s", NULL, "the lease's expiry: renewed every quarter of it; a "
	  "holder with no renewal confirmed for three quarters of it stops "
	  "consuming; a standby takes over at most this long (and a poll) "
	  "after the holder died" },
	{ S_REDIS, "state_key", T_WORD, C(redis_state_key), 0,
	  CONF_STRING_MAX, 0, NULL, NULL, "with ha = yes, the key holding "
	  "the checkpoint, written only by the lease holder; unset: "
	  "<stream>:<group>:state" },

	{ S_REDIS, "signed", T_BOOL, C(redis_signed), 0, 0, 0, "no", NULL,
	  "entries must carry a signed batch: fields producer, id, ts and "
	  "signature beside records" },
	{ S_REDIS, "trusted", T_BOOL, C(redis_trusted), 0, 0, 0, "no", NULL,
	  "auto-pause may act on unsigned entries (anyone who may XADD "
	  "could write them)" },

	{ S_KAFKA, "signed", T_BOOL, C(kafka_signed), 0, 0, 0, "no", NULL,
	  "messages must carry a signed batch: headers producer, id, ts "
	  "and signature beside the records" },
	{ S_KAFKA, "trusted", T_BOOL, C(kafka_trusted), 0, 0, 0, "no", NULL,
	  "auto-pause may act on unsigned messages (anyone who may produce "
	  "to the topic could write them)" },
	{ S_KAFKA, "brokers", T_BROKERS, C(kafka_brokers), 0, 0, 0, NULL,
	  NULL, "bootstrap brokers, comma-separated host:port; unset: no "
	  "Kafka input (then the daemon's only record input)" },
	{ S_KAFKA, "topic", T_TOPIC, C(kafka_topic), 0, CONF_TOPIC_MAX, 0,
	  "stopcock.records", NULL, "topic the records arrive on, keyed by "
	  "experiment" },
	{ S_KAFKA, "group", T_WORD, C(kafka_group), 0, CONF_STRING_MAX, 0,
	  "stopcock", NULL, "consumer group the daemons share" },
	{ S_KAFKA, "state_topic", T_TOPIC, C(kafka_state_topic), 0,
	  CONF_TOPIC_MAX, 0, "stopcock.state", NULL, "compacted topic holding "
	  "each input partition's state, as many partitions as topic" },
	{ S_KAFKA, "client_id", T_TEMPLATE, C(kafka_client_id), 0,
	  CONF_STRING_MAX, 0, "stopcockd-%h", "h", "client.id; %h is the "
	  "host name" },
	{ S_KAFKA, "instance_id", T_TEMPLATE, C(kafka_instance_id), 0,
	  CONF_STRING_MAX, F_EMPTY_OFF, "%h", "h", "group.instance.id for "
	  "static membership (a restart within session_timeout keeps the "
	  "partitions); unique per daemon; empty: dynamic membership" },
	{ S_KAFKA, "commit_every", T_DURATION, C(kafka_commit_every), 0.05,
	  3600, 0, "5s", NULL, "how often each owned partition's state and "
	  "input offset are committed in one transaction" },
	{ S_KAFKA, "session_timeout", T_DURATION, C(kafka_session_timeout),
	  1, 3600, 0, "45s", NULL, "a daemon silent this long loses its "
	  "partitions to the others" },
	{ S_KAFKA, "max_message", T_U32, C(kafka_max_message), 1024,
	  1 << 28, 0, "1048576", NULL, "bytes of one message value; larger "
	  "ones are refused and counted" },

	{ S_GUARDRAIL, "metric", T_NAME, G(metric), 0, 0, F_REQUIRED, NULL,
	  NULL, "metric the guardrail watches" },
	{ S_GUARDRAIL, "test", T_ENUM, G(test), 0, 0, F_REQUIRED, NULL,
	  conf_tests, "quantile and mean read observe records; proportion "
	  "and rate read count records" },
	{ S_GUARDRAIL, "quantile", T_DOUBLE, G(quantile), 0, 1,
	  F_OPEN_MIN | F_OPEN_MAX, NULL, NULL,
	  "which quantile; required for test = quantile, refused otherwise" },
	{ S_GUARDRAIL, "harm", T_ENUM, G(harm), 0, 0, 0, "increase", conf_harms,
	  "which direction of change is harm" },
	{ S_GUARDRAIL, "margin", T_MARGIN, G(margin), 0, 1e12, 0, "0", NULL,
	  "change tolerated before it counts as harm: absolute, or "
	  "relative with a % suffix" },
	{ S_GUARDRAIL, "action", T_ENUM, G(action), 0, 0, 0, "alert",
	  conf_actions,
	  "what harm triggers" },
	{ S_GUARDRAIL, "plan_units", T_DOUBLE, G(plan_units), 1, 1e12,
	  F_ZERO_OK, "0", NULL, "planned units per arm for this guardrail; "
	  "0: the experiment's" },
	{ S_GUARDRAIL, "unit", T_NAME, G(unit), 0, 0, 0, NULL, NULL,
	  "unit of the metric (ms, bytes, ...), shown beside its effects" },
	{ S_GUARDRAIL, "min", T_DOUBLE, G(vmin), -1e300, 1e300, F_ZERO_OK,
	  "-1e300", NULL, "the least plausible value of the metric (observe "
	  "records): lower ones are refused and counted as implausible" },
	{ S_GUARDRAIL, "max", T_DOUBLE, G(vmax), -1e300, 1e300, F_ZERO_OK,
	  "1e300", NULL, "the largest plausible value of the metric (observe "
	  "records): higher ones are refused and counted as implausible" },

	{ S_EXPERIMENT, "plan", T_PLAN, E(arms), 0, 0, 0, NULL, NULL,
	  "arms and weights, control first, as in a plan record" },
	{ S_EXPERIMENT, "alpha", T_DOUBLE, E(alpha), 0, 0.5,
	  F_OPEN_MIN | F_ZERO_OK, "0", NULL, "0: [defaults] alpha" },
	{ S_EXPERIMENT, "srm_alpha", T_DOUBLE, E(srm_alpha), 0, 0.5,
	  F_OPEN_MIN | F_ZERO_OK, "0", NULL, "0: [defaults] srm_alpha" },
	{ S_EXPERIMENT, "plan_units", T_DOUBLE, E(plan_units), 1, 1e12,
	  F_ZERO_OK, "0", NULL, "0: [defaults] plan_units" },
	{ S_EXPERIMENT, "guardrails", T_STRING, E(guardrails), 0, 1024, 0,
	  NULL, NULL, "the guardrails that apply to it, by name, fixed when "
	  "it is planned; unset: every configured guardrail" },
	{ S_EXPERIMENT, "accept_untrusted", T_BOOL, E(accept_untrusted), 0, 0,
	  0, "no", NULL, "records from untrusted inputs count for it even "
	  "when a guardrail may pause it; its pauses are then refused "
	  "(untrusted_input). no: they are refused (untrusted_input) unless "
	  "no guardrail of it may pause" },

	{ S_ALERTS, "remind", T_DURATION, C(remind_every), 0.1, 30 * 86400.0,
	  F_ZERO_OK, "0", NULL, "repeat an unacknowledged harm alert this "
	  "often; 0: never" },
	{ S_ALERTS, "runbook", T_URL, C(runbook), 0, 0, 0, NULL, NULL,
	  "link to the on-call runbook, put in every alert" },

	{ S_ALERTMANAGER, "url", T_URL, C(am_url), 0, 0, 0, NULL, NULL,
	  "Alertmanager base URL; alerts are POSTed to its /api/v2/alerts; "
	  "unset: none" },
	{ S_ALERTMANAGER, "kinds", T_KINDS, C(am_kinds), 0, 0, 0,
	  CONF_AM_KINDS_DEFAULT, conf_am_kind_names, "alert kinds and "
	  "lifecycle events sent (alerts only: not restarted, retired)" },
	{ S_ALERTMANAGER, "resend", T_DURATION, C(am_resend), 1, 3600, 0,
	  "1m", NULL, "how often a holding alert is sent again; its endsAt "
	  "is four of these ahead" },

	{ S_PAUSE, "url", T_URL, C(pause_url), 0, 0, 0, NULL, NULL,
	  "POST a signed pause request here" },
	{ S_PAUSE, "secret", T_SECRET, C(pause_secret), 0, 0, 0, NULL, NULL,
	  "signing secret of pause requests" },
	{ S_PAUSE, "redis_key", T_TEMPLATE, C(pause_redis_key), 0,
	  CONF_STRING_MAX, F_EMPTY_OFF, "stopcock:paused:%e", "e",
	  "Redis key set on pause; %e is the experiment; empty: none" },
	{ S_PAUSE, "redis_channel", T_WORD, C(pause_redis_channel), 0,
	  CONF_STRING_MAX, F_EMPTY_OFF, "stopcock:pauses", NULL,
	  "Redis channel a pause is published on; empty: none" },
	{ S_PAUSE, "pause_alpha", T_DOUBLE, C(pause_alpha), 0, 0.5,
	  F_OPEN_MIN | F_OPEN_MAX | F_ZERO_OK, "0", NULL,
	  "evidence needed to pause; below every experiment's alpha; 0: a "
	  "tenth of it" },
	{ S_PAUSE, "dry_run", T_BOOL, C(pause_dry_run), 0, 0, 0, "no", NULL,
	  "log and alert the pause but do not send it" },
	{ S_PAUSE, "allow_srm", T_BOOL, C(pause_on_srm), 0, 0, 0, "no", NULL,
	  "also pause on a sample ratio mismatch" },
	{ S_PAUSE, "max_per_hour", T_U32, C(pause_max_per_hour), 0, 100000,
	  0, "6", NULL, "pauses sent per hour at most, across experiments" },

	{ S_WEBHOOK, "url", T_URL, W(url), 0, 0, F_REQUIRED, NULL, NULL,
	  "receiver of the signed alert POSTs" },
	{ S_WEBHOOK, "secret", T_SECRET, W(secret), 0, 0, 0, NULL, NULL,
	  "Standard Webhooks signing secret; unset: unsigned" },
	{ S_WEBHOOK, "timeout", T_DURATION, W(timeout), 0.1, 300, 0, "5s",
	  NULL, "time allowed per request" },
	{ S_WEBHOOK, "max_attempts", T_INT, W(max_attempts), 1, 100, 0, "8",
	  NULL, "attempts per alert when there is no state_dir to spool "
	  "it; a spooled alert is retried until delivered" },
	{ S_WEBHOOK, "backoff_cap", T_DURATION, W(backoff_cap), 0.1, 3600, 0,
	  "300s", NULL, "largest wait between attempts (full jitter below it)" },
	{ S_WEBHOOK, "probe", T_DURATION, W(probe), 0.1, 300, 0, "5s", NULL,
	  "once the backoff is longer, a failing receiver is probed this "
	  "often with its oldest delivery; an answer sends the rest at once" },
	{ S_WEBHOOK, "spool_bytes", T_U32, W(spool_bytes), 4096, 4e9, 0,
	  "67108864", NULL, "bytes of deliveries the spool holds; when full "
	  "the oldest info alerts are dropped (counted), never harm, SRM or "
	  "pause" },
	{ S_WEBHOOK, "queue", T_U32, W(queue), 1, 1000000, 0, "1000", NULL,
	  "alerts waiting at most; beyond, the oldest info alert is "
	  "dropped, never harm, SRM or pause" },
	{ S_WEBHOOK, "kinds", T_KINDS, W(kinds), 0, 0, 0, CONF_KINDS_DEFAULT,
	  conf_kind_names, "alert kinds and lifecycle events this receiver "
	  "gets" },

	{ S_SYSLOG, "ident", T_WORD, C(syslog_ident), 0, CONF_IDENT_MAX, 0,
	  "stopcockd", NULL, "program name in syslog lines" },
	{ S_SYSLOG, "facility", T_FACILITY, C(syslog_facility), 0, 0, 0,
	  "daemon", NULL, "daemon, user or local0..local7" },
	{ S_SYSLOG, "kinds", T_KINDS, C(syslog_kinds), 0, 0, 0,
	  CONF_KINDS_DEFAULT, conf_kind_names, "alert kinds and lifecycle "
	  "events written to syslog" },

	{ S_PRODUCER, "secret", T_SECRET, P(secret), 0, 0, 0, NULL, NULL,
	  "Standard Webhooks secret its batches are signed with" },
	{ S_PRODUCER, "previous_secret", T_SECRET, P(previous_secret), 0, 0, 0,
	  NULL, NULL, "a secret still accepted while the producer rotates" },
	{ S_PRODUCER, "secret_file", T_PATH, P(secret_file), 0,
	  CONF_STRING_MAX, 0, NULL, NULL, "file holding its secrets, one a "
	  "line (kept out of this file; read at start and reload)" },
};

#undef C
#undef G
#undef E
#undef W
#undef P
const int conf_noptions = (int)SC_NELEM(conf_options);
_Static_assert(SC_NELEM(conf_options) <= CONF_OPTIONS_MAX,
    "raise CONF_OPTIONS_MAX");

/* Printable ASCII or any byte of a UTF-8 sequence; blanks if allowed. */
static int
conf_table_printable(const char *s, int blanks)
{
	const unsigned char *u = (const unsigned char *)s;

	for (; *u != '\0'; u++) {
		if (*u < 0x20 || *u == 0x7f)
			return 0;
		if (!blanks && *u == ' ')
			return 0;
	}
	return 1;
}

static int
conf_table_in_range(const struct conf_option *o, double v)
{
	if (v == 0 && (o->flags & F_ZERO_OK))
		return 1;
	if ((o->flags & F_OPEN_MIN) ? v <= o->min : v < o->min)
		return 0;
	if ((o->flags & F_OPEN_MAX) ? v >= o->max : v > o->max)
		return 0;
	return 1;
}

static void
conf_table_duration_text(double s, char *buf, size_t size)
{
	if (s >= 3600 && fmod(s, 3600) == 0)
		snprintf(buf, size, "%gh", s / 3600);
	else if (s >= 60 && fmod(s, 60) == 0)
		snprintf(buf, size, "%gm", s / 60);
	else if (s >= 1)
		snprintf(buf, size, "%gs", s);
	else
		snprintf(buf, size, "%gms", s * 1000);
}

/* "words of harm safe ...": o->extra's words, for errors and help. */
static void
conf_table_words(const struct conf_option *o, char *buf, size_t size)
{
	const char *const *c;
	size_t len;

	len = (size_t)snprintf(buf, size, "words of");
	for (c = o->extra; *c != NULL && len < size; c++)
		len += (size_t)snprintf(buf + len, size - len, " %s", *c);
}

/* The accepted values in words: used by errors and by conf_help. */
static void
conf_table_range_text(const struct conf_option *o, char *buf, size_t size)
{
	char lo[32], hi[32], words[128];
	const char *const *c;
	size_t len;

	switch (o->type) {
	case T_DOUBLE:
	case T_DURATION:
	case T_U32:
	case T_INT:
		if (o->type == T_DURATION) {
			conf_table_duration_text(o->min, lo, sizeof lo);
			conf_table_duration_text(o->max, hi, sizeof hi);
		} else {
			snprintf(lo, sizeof lo, "%.10g", o->min);
			snprintf(hi, sizeof hi, "%.10g", o->max);
		}
		snprintf(buf, size, "%s%s%s, %s%s",
		    (o->flags & F_ZERO_OK) ? "0 or " : "",
		    (o->flags & F_OPEN_MIN) ? "(" : "[", lo, hi,
		    (o->flags & F_OPEN_MAX) ? ")" : "]");
		break;
	case T_ENUM:
		words[0] = '\0';
		for (c = o->extra; *c != NULL; c++) {
			len = strlen(words);
			snprintf(words + len, sizeof words - len, "%s%s",
			    c == o->extra ? "" : "|", *c);
		}
		snprintf(buf, size, "%s", words);
		break;
	case T_BOOL:
		snprintf(buf, size, "yes|no");
		break;
	case T_NAME:
		snprintf(buf, size, "1-%d of A-Z a-z 0-9 . _ : -",
		    CONF_NAME_MAX);
		break;
	case T_STRING:
		snprintf(buf, size, "printable text, up to %.0f bytes", o->max);
		break;
	case T_WORD:
		snprintf(buf, size, "printable text without blanks, up to "
		    "%.0f bytes", o->max);
		break;
	case T_TEMPLATE:
		snprintf(buf, size, "text without blanks; %%%s is the only "
		    "escape", (const char *)o->extra);
		break;
	case T_FACILITY:
		snprintf(buf, size, "daemon, user or local0..local7");
		break;
	case T_HOSTPORT:
		snprintf(buf, size, "host:port or [v6]:port, port 1-65535");
		break;
	case T_PATH:
		snprintf(buf, size, "an absolute path, up to %.0f bytes",
		    o->max);
		break;
	case T_ADDRESS:
		snprintf(buf, size, "host:port, [v6]:port or an absolute "
		    "socket path");
		break;
	case T_URL:
		snprintf(buf, size, "an http:// or https:// URL");
		break;
	case T_SECRET:
		snprintf(buf, size, "whsec_ followed by base64");
		break;
	case T_MODE:
		snprintf(buf, size, "octal permission bits 0-%o", (unsigned)o->max);
		break;
	case T_TOKEN:
		snprintf(buf, size, "%.0f-%.0f bytes without blanks", o->min,
		    o->max);
		break;
	case T_MARGIN:
		snprintf(buf, size, ">= 0, or a percentage like 5%%");
		break;
	case T_PLAN:
		snprintf(buf, size, "2-%d arms NAME=WEIGHT", PROTO_PLAN_MAX);
		break;
	case T_BROKERS:
		snprintf(buf, size, "host:port[,host:port...], port 1-65535");
		break;
	case T_TOPIC:
		snprintf(buf, size, "a topic name of 1-%.0f of A-Z a-z 0-9 . _ -",
		    o->max);
		break;
	case T_KINDS:
		conf_table_words(o, buf, size);
		break;
	}
}

static int
conf_table_hostport_ok(const char *s)
{
	struct addr a;

	return addr_parse(s, 0, &a, NULL) == 0;
}

/* "h1:9092,h2:9092": one or more host:port, no blanks, no empty item. */
static int
conf_table_brokers_ok(const char *s)
{
	char *copy, *item, *save = NULL;
	int ok = 1, n = 0;

	if (strlen(s) > CONF_STRING_MAX || s[strlen(s) - 1] == ',' ||
	    s[0] == ',' || strstr(s, ",,") != NULL)
		return 0;
	copy = xstrdup(s);
	for (item = strtok_r(copy, ",", &save); item != NULL;
	    item = strtok_r(NULL, ",", &save)) {
		n++;
		if (!conf_table_printable(item, 0) ||
		    !conf_table_hostport_ok(item))
			ok = 0;
	}
	free(copy);
	return ok && n > 0;
}

/* Kafka's legal topic names: [A-Za-z0-9._-]+, not "." or "..". */
static int
conf_table_topic_ok(const char *s, size_t max)
{
	size_t n = strlen(s);

	if (n == 0 || n > max || strcmp(s, ".") == 0 || strcmp(s, "..") == 0)
		return 0;
	return strspn(s, "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ"
	    "0123456789._-") == n;
}

static int
conf_table_url_ok(const char *s)
{
	size_t skip;

	if (strncmp(s, "http://", 7) == 0)
		skip = 7;
	else if (strncmp(s, "https://", 8) == 0)
		skip = 8;
	else
		return 0;
	s += skip;
	if (*s == '\0' || *s == '/' || *s == '?' || *s == '#' || *s == ':')
		return 0;
	return conf_table_printable(s, 0);
}

static int
conf_table_b64_char(int c)
{
	return (c >= 'A' && c <= 'Z') || (c >= 'a' && c <= 'z') ||
	    (c >= '0' && c <= '9') || c == '+' || c == '/';
}

/* Padded standard base64 (RFC 4648 section 4), at least one byte. */
static int
conf_table_base64_ok(const char *s)
{
	size_t n = strlen(s), i, pad = 0;

	if (n == 0 || n % 4 != 0)
		return 0;
	for (i = 0; i < n; i++) {
		if (s[i] == '=') {
			if (i + 2 < n)
				return 0;
			pad++;
		} else if (pad > 0 || !conf_table_b64_char((unsigned char)s[i]))
			return 0;
	}
	return 1;
}

static int
conf_table_template_ok(const char *s, const char *letters)
{
	for (; *s != '\0'; s++) {
		if (*s != '%')
			continue;
		if (s[1] == '\0' || strchr(letters, s[1]) == NULL)
			return 0;
		s++;
	}
	return 1;
}

/* "control=50 treatment=50", parsed as the protocol's plan record is. */
static int
conf_table_plan(struct conf_experiment *e, const char *v, char **why)
{
	struct record r;
	enum proto_status st;
	char *line;
	int len, i;

	len = xasprintf(&line, "plan %s %s", e->id, v);
	st = proto_parse(line, (size_t)len, &r);
	free(line);
	if (st != PROTO_OK || r.kind != PROTO_PLAN) {
		xasprintf(why, "%s", st == PROTO_OK ? "not a plan" :
		    proto_describe(st));
		return -1;
	}
	if (r.narms < 2) {
		xasprintf(why, "a plan needs at least 2 arms, control first");
		return -1;
	}
	for (i = 0; i < r.narms; i++) {
		if (!(r.arms[i].weight > 0)) {
			xasprintf(why, "arm %s has weight %g; weights must be "
			    "> 0", r.arms[i].name, r.arms[i].weight);
			return -1;
		}
	}
	e->narms = r.narms;
	memcpy(e->arms, r.arms, sizeof r.arms);
	return 0;
}

static int
conf_table_margin(struct conf_guardrail *g, const struct conf_option *o,
    const char *v, char **why)
{
	size_t len = strlen(v);
	char buf[64];
	double m;

	if (len > 1 && len < sizeof buf && v[len - 1] == '%') {
		memcpy(buf, v, len - 1);
		buf[len - 1] = '\0';
		if (parse_double(buf, 0, 1e4, &m) == 0) {
			g->margin = m / 100;
			g->margin_relative = 1;
			return 0;
		}
	} else if (parse_double(v, o->min, o->max, &m) == 0) {
		g->margin = m;
		g->margin_relative = 0;
		return 0;
	}
	xasprintf(why, "expected a number >= 0, or a percentage like 5%% "
	    "(at most 10000%%)");
	return -1;
}

/* "harm srm resolved": blank-separated words of o->extra, each once. */
static int
conf_table_kinds(const struct conf_option *o, char *field, const char *v,
    char **why)
{
	const char *const *c;
	char *copy, *w, *save = NULL, words[CONF_KINDS_WORDS_MAX];
	uint32_t set = 0, bit;
	int i;

	copy = xstrdup(v);
	for (w = strtok_r(copy, " \t", &save); w != NULL;
	    w = strtok_r(NULL, " \t", &save)) {
		for (c = o->extra, i = 0; *c != NULL; c++, i++)
			if (strcmp(w, *c) == 0)
				break;
		bit = *c != NULL ? 1u << i : 0;
		if (bit == 0 || (set & bit) != 0) {
			conf_table_words(o, words, sizeof words);
			xasprintf(why, "%s '%.40s': expected %s",
			    bit == 0 ? "unknown kind" : "kind given twice", w,
			    words);
			free(copy);
			return -1;
		}
		set |= bit;
	}
	free(copy);
	if (set == 0) {
		xasprintf(why, "expected at least one kind");
		return -1;
	}
	*(uint32_t *)field = set;
	return 0;
}

/*
 * Parse value v for option o into the struct at base. On failure returns
 * -1 with *why saying what was expected (the caller names key and line).
 */
int
conf_table_set(const struct conf_option *o, void *base, const char *v, char **why)
{
	char *field = (char *)base + o->offset, range[128];
	const char *const *c;
	struct addr addr;
	double d;
	int ok;
	uint64_t u;
	int i;

	conf_table_range_text(o, range, sizeof range);
	switch (o->type) {
	case T_DOUBLE:
		if (parse_double(v, -HUGE_VAL, HUGE_VAL, &d) != 0 ||
		    !conf_table_in_range(o, d)) {
			xasprintf(why, "expected a number in %s", range);
			return -1;
		}
		*(double *)field = d;
		return 0;
	case T_DURATION:
		if (parse_duration(v, &d) != 0 || !conf_table_in_range(o, d)) {
			xasprintf(why, "expected a duration such as 250ms, 5s, "
			    "2m or 1h in %s", range);
			return -1;
		}
		*(double *)field = d;
		return 0;
	case T_U32:
	case T_INT:
		if (parse_u64(v, (uint64_t)o->max, &u) != 0 ||
		    !conf_table_in_range(o, (double)u)) {
			xasprintf(why, "expected a whole number in %s", range);
			return -1;
		}
		if (o->type == T_U32)
			*(uint32_t *)field = (uint32_t)u;
		else
			*(int *)field = (int)u;
		return 0;
	case T_MODE:
		/* octal, as chmod(1) spells it: 0660 or 660 */
		for (i = 0; v[i] >= '0' && v[i] <= '7'; i++)
			;
		if (i == 0 || i > 4 || v[i] != '\0' ||
		    (u = strtoull(v, NULL, 8)) > (uint64_t)o->max) {
			xasprintf(why, "expected %s", range);
			return -1;
		}
		*(uint32_t *)field = (uint32_t)u;
		return 0;
	case T_BOOL:
		if (strcasecmp(v, "yes") == 0 || strcasecmp(v, "true") == 0 ||
		    strcasecmp(v, "on") == 0 || strcmp(v, "1") == 0)
			*(int *)field = 1;
		else if (strcasecmp(v, "no") == 0 ||
		    strcasecmp(v, "false") == 0 ||
		    strcasecmp(v, "off") == 0 || strcmp(v, "0") == 0)
			*(int *)field = 0;
		else {
			xasprintf(why, "expected yes, no, true, false, on, "
			    "off, 1 or 0");
			return -1;
		}
		return 0;
	case T_ENUM:
		for (c = o->extra, i = 0; *c != NULL; c++, i++) {
			if (strcmp(v, *c) == 0) {
				*(int *)field = i;
				return 0;
			}
		}
		xasprintf(why, "expected one of %s", range);
		return -1;
	case T_NAME:
		if (!proto_name_ok(v, strlen(v))) {
			xasprintf(why, "expected a name of %s", range);
			return -1;
		}
		snprintf(field, CONF_NAME_MAX + 1, "%s", v);
		return 0;
	case T_MARGIN:
		return conf_table_margin(base, o, v, why);
	case T_PLAN:
		return conf_table_plan(base, v, why);
	case T_KINDS:
		return conf_table_kinds(o, field, v, why);
	default:
		break;
	}

	/* Strings: judge, then replace. */
	switch (o->type) {
	case T_STRING:
		ok = conf_table_printable(v, 1) && strlen(v) <= o->max;
		break;
	case T_WORD:
		ok = conf_table_printable(v, 0) && strlen(v) <= o->max;
		break;
	case T_TEMPLATE:
		ok = conf_table_printable(v, 0) && strlen(v) <= o->max &&
		    conf_table_template_ok(v, o->extra);
		break;
	case T_FACILITY:
		ok = log_facility(v) >= 0;
		break;
	case T_HOSTPORT:
		ok = conf_table_hostport_ok(v);
		break;
	case T_PATH:
		ok = v[0] == '/' && conf_table_printable(v, 1) && strlen(v) <= o->max;
		break;
	case T_ADDRESS:
		ok = addr_parse(v, ADDR_PATH_OK, &addr, NULL) == 0;
		break;
	case T_URL:
		ok = conf_table_url_ok(v) && strlen(v) <= CONF_STRING_MAX;
		break;
	case T_SECRET:
		ok = strncmp(v, "whsec_", 6) == 0 && conf_table_base64_ok(v + 6);
		break;
	case T_TOKEN:
		ok = conf_table_printable(v, 0) && strlen(v) >= o->min &&
		    strlen(v) <= o->max;
		break;
	case T_BROKERS:
		ok = conf_table_brokers_ok(v);
		break;
	case T_TOPIC:
		ok = conf_table_topic_ok(v, (size_t)o->max);
		break;
	default:
		fatal("conf: option %s has no setter", o->key);
	}
	if (!ok) {
		xasprintf(why, "expected %s", range);
		return -1;
	}
	free(*(char **)field);
	*(char **)field = xstrdup(v);
	return 0;
}

int
conf_table_is_string(enum conf_type t)
{
	switch (t) {
	case T_STRING:
	case T_WORD:
	case T_TEMPLATE:
	case T_FACILITY:
	case T_HOSTPORT:
	case T_PATH:
	case T_ADDRESS:
	case T_URL:
	case T_SECRET:
	case T_TOKEN:
	case T_BROKERS:
	case T_TOPIC:
		return 1;
	default:
		return 0;
	}
}

void
conf_table_defaults(enum conf_section s, void *base)
{
	const struct conf_option *o;
	char *why;

	for (o = conf_options; o < conf_options + conf_noptions; o++) {
		if (o->section != s || o->def == NULL)
			continue;
		if (conf_table_set(o, base, o->def, &why) != 0)
			fatal("conf: default of %s: %s", o->key, why);
	}
}

static const char *
conf_table_type_name(enum conf_type t)
{
	static const char *const names[] = {
		[T_DOUBLE] = "number", [T_DURATION] = "duration",
		[T_U32] = "integer", [T_INT] = "integer", [T_BOOL] = "bool",
		[T_ENUM] = "word", [T_NAME] = "name", [T_STRING] = "text",
		[T_WORD] = "word", [T_TEMPLATE] = "template",
		[T_FACILITY] = "word", [T_HOSTPORT] = "host:port",
		[T_PATH] = "path", [T_ADDRESS] = "address", [T_URL] = "url",
		[T_SECRET] = "secret", [T_TOKEN] = "token",
		[T_MARGIN] = "margin", [T_PLAN] = "plan",
		[T_BROKERS] = "brokers", [T_TOPIC] = "topic",
		[T_KINDS] = "words", [T_MODE] = "mode",
	};

	return names[t];
}

void
conf_help(FILE *f)
{
	const struct conf_option *o;
	enum conf_section last = S_NONE;
	char range[128];

	for (o = conf_options; o < conf_options + conf_noptions; o++) {
		if (o->section != last) {
			last = o->section;
			fprintf(f, "%s[%s%s]\n", o == conf_options ? "" : "\n",
			    conf_sections[last].name,
			    conf_sections[last].named ? " NAME" : "");
		}
		conf_table_range_text(o, range, sizeof range);
		fprintf(f, "  %-18s %-9s %-22s %s\n      %s\n", o->key,
		    conf_table_type_name(o->type),
		    o->def != NULL ? o->def :
		    (o->flags & F_REQUIRED) ? "(required)" : "(unset)",
		    range, o->help);
	}
}
