/*
 * engine_int.h: the engine's internal structures, shared by engine.c
 * (apply, tick, plans), verdict.c (tests -> verdicts) and engine_json.c
 * (views, checkpoints). Nothing outside src/core includes this.
 *
 * Ownership: struct engine owns experiments; an experiment owns its
 * metrics (each owning one series per arm), its tests and histories.
 */
#ifndef STOPCOCK_ENGINE_INT_H
#define STOPCOCK_ENGINE_INT_H

#include <stdint.h>

#include "stopcock/conf.h"
#include "stopcock/engine.h"
#include "stopcock/names.h"
#include "stopcock/sketch.h"
#include "stopcock/stats.h"
#include "stopcock/tally.h"

/* Minimum records per arm before a plug-in variance is trusted
 * (common practice for CLT-based tests; our choice of 30). */
#define ENGINE_BURN_IN 30
/* Filled unit groups before a group variance is used (our choice). */
#define ENGINE_GROUPS_MIN 30
/* The design effect of a grouped series is recomputed (an O(groups) pass
 * and a t quantile) when its records grew by this fraction, and at least
 * ENGINE_DEFF_STEP records: it moves slowly, and the per-record variance it multiplies is
 * always current. */
#define ENGINE_DEFF_REFRESH 64
#define ENGINE_DEFF_STEP 16
/* Expected events and non-events per arm before a proportion is tested
 * (common practice for normal approximations to the binomial). */
#define ENGINE_EVENTS_MIN 5
/* A change-detection block: records per arm and seconds of record time
 * at least (our choice: a CLT per block, and at most a block a second so
 * an ARL in blocks is one in seconds). */
#define ENGINE_BLOCK_RECORDS 30
#define ENGINE_BLOCK_SECONDS 1.0
/* Windowed views: last hour and last day, snapshots per window. */
#define CHANGE_WINDOWS 2
#define CHANGE_WIN_SLOTS 12
/* The SRM watermark follows the QUORUM-th newest exposure time; the ring
 * has HEADROOM intervals for exposures newer than that. */
#define ENGINE_SRM_QUORUM 3
#define ENGINE_SRM_HEADROOM 64
/* Records in an arm's sketch before its exceedance threshold is frozen. */
#define ENGINE_QUANTILE_FREEZE 500
/* Metric records held for the event-time watermark, per experiment, at
 * most (memory bound; beyond it the oldest are applied, counted). */
#define ENGINE_HELD_MAX 65536

enum metric_kind { METRIC_UNSET, METRIC_OBSERVE, METRIC_COUNT };

/*
 * Random groups of units (Wolter 2007, ch. 2): records naming their unit
 * (unit=) add to the group the unit hashes to, so all of one user's
 * requests share a group and the spread of group totals carries their
 * dependence. Allocated on the first unit= record of a series; a series
 * whose records never name a unit treats each record as its unit and
 * needs no groups.
 */
struct groups {
	uint32_t	 G;		/* unit_groups when allocated */
	uint64_t	 seq;		/* records without unit=: round robin */
	/* [2G]: group g's numerator (values, events) at sn[2g] and its
	 * denominator (records, trials) at sn[2g + 1], side by side so a
	 * record touches one cache line, not two (units hash to groups at
	 * random, so every add is a miss on a large engine) */
	double		*sn;
	uint32_t	 used;		/* groups with n != 0 */
	/* verdict.c group_var: the design effect, refreshed as the series
	 * grows by 1/ENGINE_DEFF_REFRESH (derived, not saved) */
	double		 deff_at;	/* records at the refresh, 0 never */
	double		 deff;		/* group over record-level variance */
	double		 gv;		/* group variance at the refresh */
};

/* A metric record waiting for the event-time watermark of its metric. */
struct held {
	double		 t;		/* event time */
	double		 a, b;		/* value; or k and n */
	uint64_t	 h;		/* unit hash | 1; 0: no unit= */
};

/* One arm's held records, in arrival order (a ring that grows). */
struct heldq {
	struct held	*q;
	uint32_t	 head, n, cap;
	double		 latest;	/* newest event time, -inf none */
};

struct series {
	struct tally_moments	 m;	/* observe values */
	struct tally_ratio	 r;	/* count records */
	struct sketch		*sk;	/* when a quantile guardrail reads it */
	struct groups		*grp;	/* once a unit= record arrives */
	struct heldq		 hq;	/* records newer than the watermark */
};

struct metric {
	char		 name[PROTO_NAME_MAX + 1];
	uint8_t		 len;
	enum metric_kind kind;
	int		 want_sketch;
	int		 want_k_le_n;	/* a proportion guardrail reads it */
	double		 vmin, vmax;	/* plausible values: every guardrail's */
	/*
	 * Event time (engine.c align_*): records are applied to the tallies
	 * only up to the watermark, the oldest of the arms' newest record
	 * times (but no older than the newest less the lateness), so the
	 * arms are compared on data complete for all of them.
	 */
	double		 wm;		/* applied up to here, -inf */
	double		 arrived;	/* caller's clock at the last record */
	int		 stamped;	/* a record carried its own time */
	struct series	*arm;		/* [narms] */
};

/* Chart history: a bounded series of points, decimated by two when full. */
struct hist_point {
	double	t;
	float	a, b, c, p;	/* estimate, lower, upper, p (SRM: log_e) */
};

struct hist {
	uint32_t		 n, cap;
	uint32_t		 stride;	/* take every stride-th offer */
	uint32_t		 skip;
	struct hist_point	*pt;
};

/* Snapshots of a test's cumulative tallies for one recent window. */
struct change_window {
	int		 head, n;
	double		 ts[CHANGE_WIN_SLOTS];
	double		 snap[CHANGE_WIN_SLOTS][2][3];
};

/* One guardrail x treatment arm. Identity: (guardrail name, variant). */
struct test {
	int		 g;		/* index into conf->guardrails */
	char		 variant[PROTO_NAME_MAX + 1];
	int		 arm;		/* index in the current plan, -1 gone */
	int		 metric;	/* index in exp->metrics, -1 not seen */
	enum verdict	 verdict;
	double		 log_e;		/* current epoch, at the margin */
	double		 closed_log_e;	/* product of closed epochs' values */
	double		 max_log_e;	/* running max of closed + current */
	double		 cs_lo, cs_hi;	/* running intersection, this epoch */
	double		 est, lo, hi;	/* latest estimate and CS (absolute) */
	double		 rel, rel_lo, rel_hi;
	double		 margin_abs;
	double		 ctl_value, trt_value;
	double		 ctl_lo, ctl_hi, trt_lo, trt_hi;	/* quantile CSs */
	double		 first_ts;
	uint64_t	 first_event;
	int		 pause_sent;	/* FINDING_PAUSE emitted this epoch */
	double		 tau2_level;	/* level tau2_unit was computed for */
	double		 tau2_unit;	/* mSPRT tau^2 per unit variance */
	double		 tail_q;	/* design tail for kappa, at tau2_level */
	double		 deff;		/* design effect of the larger arm */
	double		 V, tau2;	/* last mean/proportion look */
	/* quantile on a grouped metric: exceedances of x0 per unit group,
	 * control and treatment (engine.c groups_add_quantiles) */
	struct groups	*qg[2];
	double		 qx0[2];
	/* closing epoch (engine.c closing_*): log_e already added to the
	 * live test's closed part */
	double		 late_base;
	int		 est_closing;	/* est and bounds are the closing's */
	/* quantile detection: the control's quantile, frozen (change.c),
	 * and the last look's (records, beyond, records) per arm */
	double		 qd_x0;
	double		 qd_cum[2][3];
	/* per-record variances and margin of the last look (change.c) */
	double		 sig2_t, sig2_c, kfac, mlin;
	/* change detection (change.c) */
	struct stats_detect det;
	int		 det_on;	/* grid fixed */
	int		 det_alarm;	/* crossed this epoch */
	int		 by_detector;	/* the harm verdict came from it */
	double		 det_log_m;	/* latest log M */
	double		 det_start;	/* estimated change start at alarm */
	double		 blk_ts;	/* start of the open block */
	double		 snap[2][3];	/* control, treatment at blk_ts */
	struct change_window win[CHANGE_WINDOWS];
	double		 cs_n;		/* samples at the last costly CS */
	double		 ev_n;		/* samples at the last costly look */
	int		 dirty;		/* data changed since last evaluation */
	int		 hist_dirty;
	/* the last reload that restarted this test: when (tick clock),
	 * why (engine_restart_reason) and the verdict it held; why 0: none */
	double		 restart_ts;
	int		 restart_why;
	int		 restart_prev;
	struct hist	 hist;
};

struct epoch_info {
	uint32_t	 epoch;
	double		 started;
	int		 narms;
	struct proto_arm arms[PROTO_PLAN_MAX];
};

struct experiment {
	char		 id[PROTO_NAME_MAX + 1];
	uint32_t	 epoch;		/* 1-based */
	int		 narms;
	struct proto_arm arms[PROTO_PLAN_MAX];
	double		 theta0[PROTO_PLAN_MAX];	/* normalised weights */
	uint64_t	 exposures[PROTO_PLAN_MAX];	/* this epoch */
	double		 alpha, srm_alpha, plan_units;
	int		 family;	/* guardrails x treatment arms */
	/*
	 * The guardrails that apply (docs/methods.md sec. 6): with a list
	 * (the plan's guardrails=, or the [experiment] section's) only those,
	 * fixed when the experiment was planned: bits over conf->guardrails,
	 * renumbered on reload, and fam_n of them in the alpha split even if
	 * a reload removes one. Without a list (fam_fixed 0): every
	 * configured guardrail.
	 */
	uint64_t	 fam_mask;
	int		 fam_fixed;
	int		 fam_n;

	/* SRM, this epoch (Lindon & Malek 2022 Dirichlet-multinomial). */
	double		 srm_a[PROTO_PLAN_MAX];	/* posterior concentration */
	/*
	 * Event time: exposures wait in a ring of open intervals until the
	 * watermark (newest exposure time - lateness) passes their end;
	 * complete intervals are applied as one batch each.
	 */
	int64_t		 srm_done;	/* first interval not yet applied */
	double		 srm_newest;	/* newest exposure time, NAN none */
	uint32_t	 srm_slots;	/* ring length */
	uint64_t	*srm_ring;	/* [srm_slots][narms] open counts */
	uint64_t	 srm_late[PROTO_PLAN_MAX];	/* behind the watermark */
	uint64_t	 srm_ahead[PROTO_PLAN_MAX];	/* beyond the ring */
	double		 srm_top[ENGINE_SRM_QUORUM];	/* newest times */
	int		 srm_ntop;
	double		 srm_floor;	/* exposures before it: late */
	int		 srm_stamped;	/* an exposure carried its own time */
	uint64_t	 late_epoch;	/* records naming a closed epoch */
	uint64_t	 untrusted_records;	/* from untrusted inputs, this
						 * epoch */
	uint32_t	 held;		/* metric records held, all series */
	uint8_t		 unit_key[16];	/* unit-group hash key, kept */
	double		 srm_log_e, srm_max_log_e;
	int		 srm_fired;	/* untrusted this epoch */
	double		 srm_first_ts;
	uint64_t	 srm_first_event;
	int		 srm_dirty;
	struct hist	 srm_hist;

	int		 nmetrics;
	struct metric	*metrics;	/* [nmetrics], grows to max_metrics */
	int		 ntests, testcap;
	struct test	*tests;

	int		 nepochs;	/* epoch boundaries for charts */
	struct epoch_info *epochs;	/* bounded: last ENGINE_EPOCHS_KEPT */

	double		 last_ts;
	uint64_t	 last_event;
	/* the tick clock when a record last reached it (engine_idle): the
	 * caller's clock, not record time, so a backlog of old records is
	 * not idleness; NAN until the first tick (not saved) */
	double		 touched;

	/*
	 * The previous epoch stays open for epoch_grace after a ramp step, so
	 * records naming it (epoch=) count there: a closing experiment holds
	 * that epoch's tallies and tests, gathers evidence for its owner's
	 * product of epoch factors and emits nothing itself.
	 */
	struct experiment *closing;	/* owned; NULL none */
	struct experiment *owner;	/* of a closing one */
	int		 is_closing;
	double		 closing_until;	/* engine clock */
	uint64_t	 closing_records;	/* counted in it */
};

#define ENGINE_EPOCHS_KEPT 32
/* Open SRM intervals at most: bounds lateness / srm_interval. */
#define ENGINE_SRM_SLOTS_MAX 4200

struct engine {
	struct conf	*conf;		/* owned copy */
	uint8_t		 key[16];
	struct nmap	*index;		/* id -> slot in exps */
	struct experiment **exps;
	uint32_t	 nexps, capexps;
	struct engine_pool *pool;	/* shared cap, NULL none; not ours */
	int		 shard;		/* configured plans on first record */
	engine_sink	 sink;
	void		*sink_arg;
	struct engine_counters counters;
	double		 now;
	double		 clock;		/* the last tick's now, NAN none */
	uint64_t	 event;
	int		 force;		/* engine_finish: every costly look */
	uint32_t	 cursor;	/* where the last tick's budget ran out */
	struct experiment *recent;	/* the previous record's experiment */
	/* Scratch for quantile tests, grown once, reused every tick. */
	double		*scratch_v;
	uint64_t	*scratch_c;
	size_t		 scratch_n;
	/* both arms' bucket views of one look (verdict.c view_fill), as
	 * large as scratch_v: each arm's read once, then transformed */
	double		*view_lo, *view_hi;
	uint64_t	*view_c;
};

/* engine.c */
const char	*engine_restart_reason(int why);
int		 engine_family_parse(const struct conf *, const char *list,
		    uint64_t *mask, int *n);
void		 engine_family_set(struct engine *, struct experiment *,
		    uint64_t mask, int n);
struct experiment *engine_exp_new(struct engine *, const char *id,
		    const struct proto_arm *, int narms, double now);
struct experiment *engine_exp_make(struct engine *, const char *id,
		    const struct proto_arm *, int narms, double now);
void		 engine_exp_free(struct experiment *);
json_t		*finding_num(double);
void		 finding_fill(const struct engine *,
		    const struct experiment *, const struct test *,
		    enum finding_kind, struct finding *);
void		 finding_fill_srm(const struct engine *,
		    const struct experiment *, enum finding_kind,
		    struct finding *);
void		 engine_emit(struct engine *, const struct finding *);
int		 engine_metric_alloc_series(struct engine *,
		    struct experiment *, struct metric *);
void		 engine_metric_needs(const struct conf *, struct metric *);
void		 engine_fold(struct engine *, struct experiment *, int mi,
		    int arm, const struct held *);

/* align.c */
void		 align_push(struct experiment *, struct series *,
		    const struct held *);
void		 align_offer(struct engine *, struct experiment *, int mi,
		    int arm, const struct held *, int stamped);
void		 align_tick(struct engine *, struct experiment *, double now);
void		 align_flush(struct engine *, struct experiment *);

/* srm.c */
int64_t		 srm_interval_of(const struct engine *, double t);
void		 srm_complete(struct engine *, struct experiment *,
		    int64_t upto);
void		 srm_expose(struct engine *, struct experiment *, int arm,
		    uint64_t units, double t);
void		 srm_flush(struct engine *, struct experiment *);
void		 engine_link_tests(const struct engine *, struct experiment *);
void		 hist_offer(struct hist *, uint32_t cap, double t, double a,
		    double b, double c, double p);
void		 hist_free(struct hist *);

/* change.c */
void		 change_reset(struct test *);
double		 change_threshold(const struct engine *,
		    const struct experiment *);
int		 change_offer(const struct engine *, const struct experiment *,
		    struct test *, const struct conf_guardrail *,
		    const struct series *, const struct series *, double sig2_t,
		    double sig2_c, double k, double m);
int		 change_offer_quantile(const struct engine *,
		    const struct experiment *, struct test *,
		    const struct conf_guardrail *, double na, double ea,
		    double nb, double eb, double deff);

void		 change_window_offer(const struct engine *, struct test *,
		    const struct conf_guardrail *, const struct series *,
		    const struct series *);
double		 change_window_estimate(const struct engine *,
		    const struct test *, const struct conf_guardrail *,
		    const struct series *, const struct series *, int i,
		    double *since, double rec[2]);
double		 change_window_span(int i);

/* verdict.c */
double		 plan_units_of(const struct conf_guardrail *,
		    const struct experiment *);
void		 verdict_evaluate(struct engine *, struct experiment *,
		    struct test *, int costly);
void		 verdict_srm(struct engine *, struct experiment *);
double		 verdict_level(const struct experiment *);
/* pause_alpha, or a tenth of the alpha, split over the family */
double		 verdict_pause_level(const struct engine *,
		    const struct experiment *);

/* engine.c: a new engine; shard: engine_new_shard's, else engine_new's. */
struct engine	*engine_make(const struct conf *, const uint8_t hashkey[16],
		    int shard);
/* engine.c: an experiment by id, or NULL */
struct experiment *engine_find(const struct engine *, const char *id);
void		 engine_groups_free(struct groups *);

/* engine_exp.c: a plan for experiment id (family: its family or NULL) */
enum engine_reject engine_exp_apply_plan(struct engine *,
		    const struct proto_arm *, int narms, const char *id,
		    const char *family, double now);
void		 engine_exp_retire_closing(struct engine *, struct experiment *);
void		 engine_exp_test_init(struct test *, int g, const char *variant);
/* guardrail g is in e's family */
int		 engine_exp_applies(const struct experiment *, int g);
void		 engine_exp_ensure_tests(const struct engine *,
		    struct experiment *);
void		 engine_exp_settings(const struct engine *, struct experiment *);

#endif
