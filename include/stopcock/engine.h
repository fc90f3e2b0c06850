/*
 * engine.h: the pure engine, the one entry point of the core. The daemon,
 * `stopcock replay`, `stopcock simulate` and the tests all drive it the
 * same way: engine_apply() for each parsed record, engine_tick() on a
 * timer (record time in replay, wall time in the daemon). The engine
 * never does I/O, never blocks and never reads the clock: time comes in
 * with each call. Verdict changes leave through the sink callback.
 *
 * Data flow inside: record -> experiment/epoch/arm/metric lookup ->
 * tallies -> tests (cheap ones on apply, quantiles on tick) -> verdicts.
 */
#ifndef STOPCOCK_ENGINE_H
#define STOPCOCK_ENGINE_H

#include <stddef.h>
#include <stdint.h>

#include <jansson.h>

#include "stopcock/conf.h"
#include "stopcock/proto.h"

enum verdict { VERDICT_UNDECIDED, VERDICT_HARM, VERDICT_SAFE };

/* Why a record was refused by the engine (after parsing succeeded). */
enum engine_reject {
	ENGINE_OK = 0,
	ENGINE_E_UNPLANNED,	/* "unplanned": no plan for the experiment */
	ENGINE_E_VARIANT,	/* "unknown_variant": not in the current plan */
	ENGINE_E_EXPERIMENTS,	/* "cap_experiments" */
	ENGINE_E_VARIANTS,	/* "cap_variants": plan with too many arms */
	ENGINE_E_METRICS,	/* "cap_metrics" */
	ENGINE_E_MISMATCH,	/* "kind_mismatch": observe for a count metric.. */
	ENGINE_E_K_GT_N,	/* "k_exceeds_n": proportion with K > N */
	ENGINE_E_CLOSED_EPOCH,	/* "closed_epoch": epoch= names a past epoch */
	ENGINE_E_FUTURE_EPOCH,	/* "future_epoch": epoch= not planned yet */
	ENGINE_E_GUARDRAIL,	/* "unknown_guardrail": a plan's guardrails=
				 * names one not configured */
	ENGINE_E_IMPLAUSIBLE,	/* "implausible": outside a guardrail's
				 * min and max */
	ENGINE_E_UNDECLARED,	/* "undeclared": a plan record for an
				 * experiment the config does not declare,
				 * with declared_only */
	ENGINE_E_UNTRUSTED,	/* "untrusted_input": a record from an
				 * untrusted input for an experiment a
				 * guardrail may pause */
	ENGINE_NREJECT
};

enum finding_kind {
	FINDING_VERDICT,	/* a guardrail x arm verdict changed */
	FINDING_SRM,		/* sample ratio mismatch established */
	FINDING_UNTRUSTED,	/* SRM made the experiment's verdicts untrustworthy */
	FINDING_PAUSE,		/* a pause guardrail reached pause_alpha */
	FINDING_EPOCH,		/* a new plan started an epoch (or a reset) */
	/* a reload changed a guardrail's test definition (margin, quantile,
	 * direction, test, metric, plan_units): its evidence starts afresh.
	 * previous is the verdict it held, reason says what changed; also
	 * sent, with the last state, when a reload removed the guardrail */
	FINDING_RESTART,
	/* the experiment was retired (engine_retire): its last state */
	FINDING_RETIRED
};

struct finding_arm {
	const char	*variant;
	double		 weight;
	uint64_t	 exposures;	/* this epoch */
	double		 n;		/* samples (observe) or sum N (count) */
	double		 k;		/* sum K (count metrics) */
	double		 value;		/* arm's mean, rate or quantile */
	double		 lower, upper;	/* CS for value (quantiles), else NAN */
};

/*
 * Everything an alert, a replay line, the API or a metric needs about one
 * test (experiment x guardrail x treatment arm, or the SRM check). All
 * pointers are borrowed from the engine and valid until the next call
 * into it.
 */
struct finding {
	enum finding_kind kind;
	const char	*experiment;
	uint32_t	 epoch;		/* 1-based */
	const char	*guardrail;	/* configured name, or "srm" */
	const char	*metric;	/* NULL for srm */
	const char	*test;		/* "mean", ..., "srm" */
	enum conf_test	 test_kind;	/* test as the enum; unset for srm */
	double		 quantile;	/* for quantile tests, else 0 */
	const char	*variant;	/* treatment arm (NULL for srm) */
	const char	*control;
	const char	*harm;		/* "increase" | "decrease" */
	enum verdict	 verdict;
	enum verdict	 previous;
	int		 action_pause;
	double		 p;		/* always-valid p-value */
	double		 log_e;		/* current log evidence */
	double		 alpha;		/* level of this test: alpha / family */
	double		 alpha_total;	/* the experiment's alpha */
	/* the level a pause is held to: pause_alpha (or alpha / 10) over
	 * the family; for the SRM check its own alpha */
	double		 pause_level;
	int		 family;	/* guardrails x treatment arms */
	double		 estimate, lower, upper;	/* effect, absolute */
	double		 rel_estimate, rel_lower, rel_upper;	/* relative */
	double		 margin;	/* absolute margin in force */
	double		 chi2_p;	/* srm: one-look chi-square p */
	double		 sketch_accuracy;	/* quantile tests */
	double		 design_effect;	/* variance / independent-unit one */
	/* change detection: log M, its threshold, the estimated start of
	 * the change (record time) and whether it raised this harm */
	double		 detect_log_m, detect_threshold, change_start;
	int		 by_detector;
	/* the effect over the last hour and day of record time, since when,
	 * and the records per arm (control, treatment) it rests on */
	double		 recent[2], recent_since[2], recent_records[2][2];
	/* quantiles: recent[] is the change in the share of values beyond
	 * this threshold (the control's frozen quantile), NAN otherwise */
	double		 recent_threshold;
	/* the record time a verdict speaks of: epoch start to now */
	double		 covers_from, covers_to;
	int		 untrusted;	/* SRM has fired in this epoch */
	/* records of this epoch that came from untrusted inputs (see
	 * record.untrusted): auto-pause does not act on such evidence */
	uint64_t	 untrusted_records;
	double		 ts;		/* record time of the finding */
	double		 first_ts;	/* when the verdict first held */
	uint64_t	 event;		/* record number it was found at */
	const char	*reason;	/* FINDING_RESTART, FINDING_RETIRED;
					 * else NULL */
	int		 narms;
	struct finding_arm arms[PROTO_PLAN_MAX];
};

typedef void (*engine_sink)(void *arg, const struct finding *);

struct engine_counters {
	uint64_t	 applied[4];	/* by enum proto_kind */
	uint64_t	 rejected[ENGINE_NREJECT];
	uint32_t	 experiments;
	uint64_t	 series;	/* (experiment, epoch, arm, metric) */
	uint64_t	 tests;		/* live guardrail x arm tests */
	size_t		 bytes;		/* memory held by tallies and tests */
	uint64_t	 findings;
	uint64_t	 grouped_series;	/* series that began unit groups */
	uint64_t	 srm_late;	/* exposures behind the watermark */
	uint64_t	 metric_late;	/* metric records behind their metric's
					 * watermark (applied at once) */
	uint64_t	 held_forced;	/* applied early: ENGINE_HELD_MAX */
	uint64_t	 held;		/* metric records waiting (gauge) */
	uint64_t	 closing_records;	/* epoch= of the closing epoch */
};

struct engine;

/* hashkey seeds the SipHash tables; the conf is copied (not borrowed). */
struct engine	*engine_new(const struct conf *, const uint8_t hashkey[16]);
void		 engine_free(struct engine *);
/*
 * An engine for a shard of the experiments (a Kafka partition, or the
 * main engine of a daemon whose records all come from Kafka): an
 * experiment planned in the configuration is planned here when its
 * first record arrives, not at creation, so it lives only in the shard
 * its records reach and not as an empty copy in every other. (Retired,
 * it comes back with its next record, as it would at a start.)
 */
struct engine	*engine_new_shard(const struct conf *,
		    const uint8_t hashkey[16]);
void		 engine_set_sink(struct engine *, engine_sink, void *arg);

/*
 * A cap on experiments that several engines share (a daemon's Kafka
 * partitions have an engine each): a new experiment is refused
 * (ENGINE_E_EXPERIMENTS) when the pool holds max, as when the engine
 * itself holds max_experiments, so hostile keys spread over many
 * partitions cannot multiply the bound. The owner keeps the pool and
 * sets max; an engine counts its experiments in it from engine_set_pool
 * until engine_set_pool(eng, NULL) or engine_free. Experiments an engine
 * already holds when it joins stay (a restored state is never cut), so
 * used may exceed max until some retire.
 */
struct engine_pool {
	uint32_t	 used;
	uint32_t	 max;
};
void		 engine_set_pool(struct engine *, struct engine_pool *);
/* Swap the configuration (guardrails, alpha, caps) keeping tallies;
 * tests whose guardrail changed restart. */
int		 engine_reconfigure(struct engine *, const struct conf *,
		    char **cause);

/*
 * Apply one record at time now (the record's own ts when it has one is
 * used for the finding's ts). event is the caller's sequence number
 * (1-based line number in replay). Cheap tests run here.
 */
enum engine_reject engine_apply(struct engine *, const struct record *,
		    double now, uint64_t event);
/*
 * Run costly tests (quantiles, rates) whose data grew enough since their
 * last look, and take chart history points. engine_finish looks at every
 * test regardless (end of a replay or simulation).
 */
void		 engine_tick(struct engine *, double now);
void		 engine_finish(struct engine *, double now);
const char	*engine_reason(enum engine_reject);

/* Operator actions (from the HTTP API). 0 or -1 with *cause. */
int		 engine_plan(struct engine *, const char *experiment,
		    const struct proto_arm *, int narms, double now,
		    char **cause);
int		 engine_new_epoch(struct engine *, const char *experiment,
		    double now, char **cause);
int		 engine_reset(struct engine *, const char *experiment,
		    double now, char **cause);

/*
 * Retire experiment id at time now (why: "operator", "idle", ...): its
 * held records are applied and its tests looked at a last time, then
 * *archive (a new reference) holds its final state:
 *   {"format": "stopcock-archive", "version": 1, "experiment": ID,
 *    "retired": TS, "reason": WHY, "state": engine_json_experiment}
 * A FINDING_RETIRED is emitted and the experiment is freed, its slot
 * under max_experiments with it. Nothing is written: the caller stores
 * the archive. 0, or -1 with *cause when there is no such experiment.
 */
int		 engine_retire(struct engine *, const char *id, const char *why,
		    double now, json_t **archive, char **cause);
/* The experiment idle longest, if no record reached it for idle seconds
 * before now (engine clock); NULL when none (or idle <= 0). Experiments
 * planned in the configuration are never idle. Borrowed. */
const char	*engine_idle(const struct engine *, double now, double idle);
void		 engine_counters(const struct engine *,
		    struct engine_counters *);
/* Current state of every test, SRM checks included, through cb. */
void		 engine_foreach(const struct engine *,
		    void (*cb)(void *, const struct finding *), void *arg);
/* One experiment only; -1 when unknown. */
int		 engine_foreach_in(const struct engine *, const char *experiment,
		    void (*cb)(void *, const struct finding *), void *arg);

/*
 * JSON views for the API. New references. Pinned shapes:
 *
 * engine_json_list:
 *   {"experiments": [{"id": "...", "epoch": 1, "untrusted": false,
 *     "arms": [{"variant": "control", "weight": 50, "exposures": 1234}],
 *     "guardrails": [{"name": "...", "variant": "...",
 *                     "verdict": "harm|safe|undecided", "p": 0.3}],
 *     "srm": {"verdict": "harm|undecided", "p": 0.5}}]}
 *
 * engine_json_experiment: the list entry plus
 *   "control": "...", "alpha": 0.05, "srm_alpha": 0.001, "family": 6,
 *   "epochs": [{"epoch": 1, "started": TS, "arms": [{"variant","weight"}]}],
 *   "srm": {"verdict", "p", "log_e", "alpha", "chi2_p", "first_ts",
 *           "history": [[t, log_e, p], ...]},
 *   "tests": [ finding_json(test) + {"history": [[t, estimate, lower,
 *              upper, p], ...]} ]
 * Times are unix seconds (record time). Non-finite numbers are null.
 */
json_t		*engine_json_list(const struct engine *);
json_t		*engine_json_experiment(const struct engine *, const char *id);

/* The fixed mixture parameters for a two-arm experiment under the
 * configuration's defaults (logged at start and reload). */
json_t		*engine_json_tuning(const struct engine *);

/* Full state for checkpoints; restore refuses foreign or bad input. */
json_t		*engine_save(const struct engine *);
struct engine	*engine_restore(const struct conf *, const uint8_t hashkey[16],
		    const json_t *, char **cause);
/* The same into an engine_new_shard. */
struct engine	*engine_restore_shard(const struct conf *,
		    const uint8_t hashkey[16], const json_t *, char **cause);

const char	*verdict_name(enum verdict);
/*
 * The finding as a JSON object (the replay line, webhook payload and API
 * test entry): kind, experiment, epoch, guardrail, metric, test, quantile,
 * variant, control, harm, action, verdict, previous, p, log_e, alpha,
 * alpha_total, family, estimate, lower, upper, rel_estimate, rel_lower,
 * rel_upper, margin, chi2_p (srm), sketch_accuracy (quantile), untrusted,
 * ts, first_ts, event, arms: [{variant, weight, exposures, n, k, value,
 * lower, upper}]. Non-finite numbers are null.
 */
json_t		*finding_json(const struct finding *);
/* A number for JSON: itself when finite, else null. New reference. */
json_t		*finding_num(double);

#endif
