/*
 * conf.h: stopcock's configuration. One table of options in conf.c drives
 * parsing, validation, defaults and the help text. Loading is
 * all-or-nothing: a file with any error yields no configuration and every
 * error as "file:line: message". The structure is plain data, read-only
 * once loaded; its owner frees it with conf_free.
 */
#ifndef STOPCOCK_CONF_H
#define STOPCOCK_CONF_H

#include <stddef.h>
#include <stdint.h>
#include <stdio.h>

#include "stopcock/proto.h"

#define CONF_NAME_MAX PROTO_NAME_MAX
#define CONF_GUARDRAILS_MAX 64
#define CONF_EXPERIMENTS_MAX 256	/* planned in the file */
#define CONF_WEBHOOKS_MAX 16
#define CONF_PRODUCERS_MAX 32	/* [producer NAME] sections */

enum conf_test { TEST_MEAN, TEST_PROPORTION, TEST_RATE, TEST_QUANTILE };
enum conf_harm { HARM_INCREASE, HARM_DECREASE };
enum conf_action { ACTION_ALERT, ACTION_PAUSE };
enum conf_redis_start { REDIS_START_END, REDIS_START_BEGINNING };

struct conf_guardrail {
	char		name[CONF_NAME_MAX + 1];
	char		metric[CONF_NAME_MAX + 1];
	enum conf_test	test;
	double		quantile;	/* test = quantile: in (0, 1) */
	enum conf_harm	harm;
	double		margin;		/* >= 0 */
	int		margin_relative;	/* margin given with a % suffix;
					   stored as a fraction (5% -> 0.05) */
	enum conf_action action;
	double		plan_units;	/* 0: use the experiment's / default */
	char		unit[CONF_NAME_MAX + 1];	/* of the metric, "" none */
	/* plausible values of an observe record (min, max): others are
	 * refused as implausible before any test sees them */
	double		vmin, vmax;
	int		line;		/* where it was defined, for messages */
};

struct conf_experiment {
	char		id[CONF_NAME_MAX + 1];
	int		narms;		/* 0: no plan in the file */
	struct proto_arm arms[PROTO_PLAN_MAX];
	double		alpha;		/* 0: defaults.alpha */
	double		srm_alpha;	/* 0: defaults.srm_alpha */
	double		plan_units;	/* 0: defaults.plan_units */
	/* the guardrails that apply, names separated by blanks; NULL:
	 * every configured guardrail (engine.c, docs/methods.md sec. 6) */
	char		*guardrails;
	/* records from untrusted inputs count even though a guardrail
	 * may pause it (its pauses are then refused) */
	int		accept_untrusted;
	int		line;
};

/* A producer of signed batches (frame.h): its secrets, for rotation. */
struct conf_producer {
	char		name[CONF_NAME_MAX + 1];
	char		*secret;	/* "whsec_" + base64, may be NULL */
	char		*previous_secret;	/* still accepted, may be NULL */
	char		*secret_file;	/* one secret a line, may be NULL */
	int		line;
};

/*
 * What an alert output receives ([webhook] kinds, [syslog] kinds,
 * [alertmanager] kinds): a set of alert kinds, each raised alert of those
 * kinds, plus the lifecycle events named. An event reaches an output when
 * both its alert's kind and (for all but raised) its event are chosen;
 * restarted and retired, which belong to no alert, when they are named.
 */
enum conf_kind {
	CONF_KIND_HARM = 1 << 0,
	CONF_KIND_SAFE = 1 << 1,
	CONF_KIND_SRM = 1 << 2,
	CONF_KIND_PAUSE = 1 << 3,
	CONF_KIND_DRY_RUN = 1 << 4,
	CONF_KIND_REMINDER = 1 << 5,
	CONF_KIND_ACKNOWLEDGED = 1 << 6,
	CONF_KIND_RESOLVED = 1 << 7,
	/* news that is not an alert: it reaches an output that names it */
	CONF_KIND_RESTARTED = 1 << 8,	/* a reload restarted a test */
	CONF_KIND_RETIRED = 1 << 9	/* an experiment was retired */
};
#define CONF_KINDS_ALL 0x3ffu
/* The words of enum conf_kind, bit i = word i, NULL-ended. */
extern const char *const conf_kind_names[];

struct conf_webhook {
	char		name[CONF_NAME_MAX + 1];
	char		*url;
	uint32_t	kinds;		/* enum conf_kind bits */
	char		*secret;	/* "whsec_" + base64, may be NULL */
	double		timeout;	/* seconds per request */
	int		max_attempts;
	uint32_t	queue;		/* bounded queue length */
	double		backoff_cap;	/* seconds, largest backoff */
	double		probe;		/* seconds between probes of a
					 * receiver that keeps failing */
	uint32_t	spool_bytes;	/* bound of the spool's bodies */
	int		line;
};

/* Open SRM intervals (lateness / srm_interval) at most; the engine's
 * ring holds two more. */
#define CONF_SRM_OPEN_MAX 4000
/* Largest unit_groups (the option table's bound). */
#define CONF_UNIT_GROUPS_MAX 4096

struct conf {
	char		*path;		/* file it came from, or NULL */

	/* [defaults]: statistics */
	double		alpha;		/* family-wise budget per experiment */
	double		srm_alpha;
	double		plan_units;	/* planned units per arm: tunes mixtures */
	double		rate_concentration;	/* 0: 100 */
	double		sketch_accuracy;
	uint32_t	sketch_buckets;
	uint32_t	history_points;	/* chart points kept per test */
	uint32_t	tick_budget;	/* costly looks per tick, 0: no limit */
	/* event time: the SRM test reads only complete intervals */
	double		lateness;	/* allowed lateness of an exposure, s */
	double		epoch_grace;	/* previous epoch open to epoch=, s */
	int		declared_only;	/* stream plans: [experiment] only */
	double		srm_interval;	/* SRM interval length, s */
	uint32_t	unit_groups;	/* variance groups per arm (unit=) */
	double		detect_arl;	/* s of record time between false
					 * change alarms, per experiment */
	/* [defaults]: caps (hostile cardinality) */
	uint32_t	max_experiments;
	uint32_t	max_variants;
	uint32_t	max_metrics;
	double		retire_idle;	/* s without a record before an
					 * experiment is retired; 0: never */

	int		nguardrails;
	struct conf_guardrail guardrails[CONF_GUARDRAILS_MAX];
	int		nexperiments;
	struct conf_experiment experiments[CONF_EXPERIMENTS_MAX];

	/* [daemon] */
	char		*tcp;		/* host:port or NULL */
	char		*udp;
	char		*unix_path;
	char		*http;
	char		*state_dir;
	double		tick;		/* seconds */
	double		checkpoint_every;	/* seconds */
	uint32_t	max_clients;
	uint32_t	max_clients_per_source;	/* address, /64 or uid */
	double		client_idle_timeout;	/* s without a byte; 0: never */
	double		client_line_timeout;	/* s for one line; 0: never */
	uint32_t	client_buffer;	/* bytes buffered per client */
	char		*http_token;	/* bearer token for POST; NULL: POST off */
	/* inputs: signed batches required (frame.h), and trust: what
	 * auto-pause may act on (a signed input is trusted) */
	int		tcp_signed, udp_signed, unix_signed;
	int		tcp_trusted, udp_trusted, unix_trusted;
	double		signature_tolerance;	/* s either side of now */
	uint32_t	unix_mode;	/* permission bits of the socket */
	char		*unix_group;	/* group of the socket; NULL: ours */
	char		*public_url;	/* base of links in alerts */

	/* [redis] */
	char		*redis_address;	/* NULL: no Redis input */
	char		*redis_stream;
	char		*redis_group;
	char		*redis_consumer;	/* "%h" expands to the host name */
	char		*redis_dead_letter;
	uint32_t	redis_max_deliveries;
	double		redis_claim_idle;	/* seconds */
	uint32_t	redis_batch;	/* entries per XREADGROUP */
	double		redis_block;	/* seconds per blocking read */
	int		redis_start;	/* enum conf_redis_start: a new group */
	int		redis_ha;	/* lease + checkpoint in Redis */
	char		*redis_lease_key;	/* NULL: derived */
	double		redis_lease_ttl;	/* seconds */
	char		*redis_state_key;	/* NULL: derived */
	int		redis_signed, redis_trusted;

	/* [kafka] */
	char		*kafka_brokers;	/* NULL: no Kafka input */
	char		*kafka_topic;
	char		*kafka_group;
	char		*kafka_state_topic;	/* compacted: partition states */
	char		*kafka_client_id;	/* "%h" expands to the host name */
	char		*kafka_instance_id;	/* static membership; NULL: none */
	double		kafka_commit_every;	/* seconds between transactions */
	double		kafka_session_timeout;	/* seconds */
	uint32_t	kafka_max_message;	/* bytes of one message value */
	int		kafka_signed, kafka_trusted;

	/* [alerts] */
	double		remind_every;	/* 0: no reminders */
	char		*runbook;	/* link put in every alert, NULL none */

	/* [alertmanager] */
	char		*am_url;	/* base URL; NULL: no Alertmanager */
	uint32_t	am_kinds;	/* enum conf_kind bits */
	double		am_resend;	/* seconds between refreshes */

	/* [pause] */
	char		*pause_url;
	char		*pause_secret;
	char		*pause_redis_key;	/* "%e" = experiment id */
	char		*pause_redis_channel;
	double		pause_alpha;	/* 0: a tenth of the experiment's alpha */
	int		pause_dry_run;
	int		pause_on_srm;	/* allow pausing for SRM itself */
	uint32_t	pause_max_per_hour;

	/* [syslog] */
	char		*syslog_ident;
	char		*syslog_facility;
	uint32_t	syslog_kinds;	/* enum conf_kind bits */

	int		nwebhooks;
	struct conf_webhook webhooks[CONF_WEBHOOKS_MAX];

	int		nproducers;
	struct conf_producer producers[CONF_PRODUCERS_MAX];
};

/* Defaults only (no guardrails, no listeners). */
struct conf	*conf_new(void);
void		 conf_free(struct conf *);
/*
 * Parse INI text; name is used in messages. Returns 0 and *out, or -1
 * and *cause (all errors, one "name:line: message" per line; caller
 * frees).
 */
int		 conf_parse(const char *text, const char *name,
		    struct conf **out, char **cause);
/* Read a file, then conf_parse. */
int		 conf_load(const char *path, struct conf **out, char **cause);
/* The option table as help text. */
void		 conf_help(FILE *);
const struct conf_guardrail *conf_guardrail_for(const struct conf *,
		    const char *metric, int *index_from);
const struct conf_experiment *conf_experiment_find(const struct conf *,
		    const char *id);
const char	*conf_test_name(enum conf_test);
/* What stopcockd needs beyond conf_load: an input and a state
 * directory. 0, or -1 and *cause (stopcockd -t and check-config). */
int		 conf_check_daemon(const struct conf *, char **cause);
/* [daemon] unix_group (a name or a number) as a group id; 0 or -1. */
int		 conf_unix_group(const char *, unsigned *gid, char **cause);
/* Read a producer's secret file: fn(arg, secret, &why) for each secret
 * (fn may be NULL: only checked); 0, or -1 with *cause naming the file
 * and line but never a secret. */
int		 conf_secret_file(const char *path, int (*fn)(void *,
		    const char *, char **), void *arg, char **cause);
/* A deep copy (the engine keeps its own); free with conf_free. */
struct conf	*conf_dup(const struct conf *);

#endif
