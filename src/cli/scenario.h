/*
 * scenario.h: the one synthetic-traffic generator of stopcock. A scenario
 * describes experiments, their arms and weights (with an optional ramp to
 * other weights part-way through), the traffic rate that stamps record
 * times, the baseline distribution of every metric, an effect on one arm
 * and an optional sample ratio mismatch. A generator turns it into a
 * reproducible stream of records (GSL random numbers, one seed), exactly
 * as clients would send them: `stopcock generate` prints the stream and
 * `stopcock simulate` feeds it to the engine in memory, so the two never
 * disagree about what the data look like.
 *
 * Each unit (a user's visit) is one expose record followed by one record
 * per metric, in the scenario's metric order.
 */
#ifndef STOPCOCK_SCENARIO_H
#define STOPCOCK_SCENARIO_H

#include <stdint.h>

#include "stopcock/conf.h"
#include "stopcock/proto.h"

#define SCENARIO_METRICS_MAX 32
#define SCENARIO_EXPERIMENTS_MAX 999999	/* ids take 6 digits */

enum scenario_dist {
	SCEN_LOGNORMAL,	/* observe: median a, log-sd b */
	SCEN_NORMAL,	/* observe: mean a, sd b */
	SCEN_BINOMIAL,	/* count K of N: error probability a per request,
			   b requests per unit on average (N = 1 + Poisson),
			   per-unit probability ~ Beta with concentration c
			   (0: no clustering) */
	SCEN_POISSON	/* count K over exposure N: a events per hour,
			   N ~ exponential hours with mean b */
};

struct scenario_metric {
	char			name[PROTO_NAME_MAX + 1];
	enum scenario_dist	dist;
	double			a, b, c;
	/* Effect on the effect arm: none when effect == 0. */
	double			effect;
	int			effect_relative;	/* effect is a fraction */
	double			effect_above;	/* observe only: change only
						   values above this baseline
						   quantile (0: all) */
};

struct scenario {
	char		experiment[PROTO_NAME_MAX + 1];	/* id, or prefix */
	uint32_t	nexperiments;	/* > 1: ids "PREFIX-000001".. */
	int		narms;
	struct proto_arm arms[PROTO_PLAN_MAX];
	double		ramp_at;	/* fraction of records; 0: no ramp */
	struct proto_arm ramp_arms[PROTO_PLAN_MAX];	/* same names */
	int		effect_arm;	/* index into arms (default: last) */
	int		srm_arm;	/* index into arms (default: last) */
	double		srm_loss;	/* share of srm_arm's units lost */
	double		rate;		/* records per second; 0: no stamps */
	double		start;		/* unix time of the first record */
	uint64_t	records;	/* records in the whole stream */
	int		nmetrics;
	struct scenario_metric metrics[SCENARIO_METRICS_MAX];
};

/* Defaults: one experiment "exp", control=50 treatment=50, 1000 records/s,
 * no metrics. */
void	scenario_init(struct scenario *);
/*
 * Give every metric that conf's guardrails read a default baseline of the
 * matching kind (quantile: lognormal latency, mean: normal, proportion:
 * clustered errors, rate: crashes per hour); metrics already present keep
 * their definition. Returns the number of metrics.
 */
int	scenario_from_conf(struct scenario *, const struct conf *);
/* The invented demo: see scenario.c. */
void	scenario_demo(struct scenario *);
/* Apply a "--scenario NAME" preset found in argv before the other
 * options, so they refine it in any order. */
void	scenario_preset(struct scenario *, int argc, char **argv);

/*
 * Option parsers shared by generate and simulate; 0 or -1 with *cause.
 *   arms:     "control=50,treatment=50"
 *   ramp:     "0.2:control=50,treatment=50"
 *   baseline: "latency_ms=lognormal:180:0.5", "render_ms=normal:850:120",
 *             "server_errors=binomial:0.01:8:30", "crashes=poisson:0.02:0.5"
 *   effect:   "latency_ms=+15%", "render_ms=+20", "latency_ms=+15%,above=0.95"
 *             (a guardrail name of conf is accepted in place of the metric)
 */
int	scenario_parse_arms(const char *, struct proto_arm *, int *narms,
	    char **cause);
int	scenario_parse_ramp(struct scenario *, const char *, char **cause);
int	scenario_parse_baseline(struct scenario *, const char *, char **cause);
int	scenario_parse_effect(struct scenario *, const struct conf *,
	    const char *, char **cause);
/*
 * Options that need the metrics in place, gathered while parsing and
 * applied by scenario_finish in a fixed order: baselines, then conf's
 * guardrails' defaults (or, with no conf and no metric, one metric of
 * each kind), then effects and the effect arm.
 */
#define SCENARIO_SPECS_MAX 64
struct scenario_opts {
	const char	*baseline[SCENARIO_SPECS_MAX];
	int		 nbaseline;
	const char	*effect[SCENARIO_SPECS_MAX];
	int		 neffect;
	const char	*effect_arm;	/* variant name or NULL */
	const char	*ramp;		/* ramp spec or NULL */
};
/*
 * Long options shared by generate and simulate (getopt_long entries and
 * codes); scenario_option handles one of them: 0, or -1 with *cause.
 */
enum {
	SOPT_EXPERIMENTS = 0x100, SOPT_EXPERIMENT, SOPT_ARMS, SOPT_RAMP,
	SOPT_BASELINE, SOPT_EFFECT, SOPT_EFFECT_ARM, SOPT_SRM_LOSS, SOPT_RATE,
	SOPT_START, SOPT_RECORDS, SOPT_SCENARIO, SOPT_LAST
};
#define SCENARIO_LONGOPTS \
	{ "experiments", required_argument, NULL, SOPT_EXPERIMENTS }, \
	{ "experiment", required_argument, NULL, SOPT_EXPERIMENT }, \
	{ "arms", required_argument, NULL, SOPT_ARMS }, \
	{ "ramp", required_argument, NULL, SOPT_RAMP }, \
	{ "baseline", required_argument, NULL, SOPT_BASELINE }, \
	{ "effect", required_argument, NULL, SOPT_EFFECT }, \
	{ "effect-arm", required_argument, NULL, SOPT_EFFECT_ARM }, \
	{ "srm-loss", required_argument, NULL, SOPT_SRM_LOSS }, \
	{ "rate", required_argument, NULL, SOPT_RATE }, \
	{ "start", required_argument, NULL, SOPT_START }, \
	{ "records", required_argument, NULL, SOPT_RECORDS }, \
	{ "scenario", required_argument, NULL, SOPT_SCENARIO }
/* Help lines for the shared options. */
extern const char scenario_help[];
int	scenario_option(struct scenario *, struct scenario_opts *, int code,
	    const char *arg, char **cause);
/* Collect one spec; -1 with *cause when there are too many. */
int	scenario_opts_add(const char **, int *, const char *, char **cause);
int	scenario_finish(struct scenario *, const struct conf *,
	    const struct scenario_opts *, char **cause);
/* Resolve a variant name to an arm index; -1 when unknown. */
int	scenario_arm(const struct scenario *, const char *);
/* Check the whole scenario; 0 or -1 with *cause. */
int	scenario_check(const struct scenario *, char **cause);
int	scenario_metric_find(const struct scenario *, const char *);
/* Records per unit: the expose record plus one per metric. */
int	scenario_records_per_unit(const struct scenario *);
/* The arms' assignment shares actually drawn (after SRM loss), epoch 1 or
 * 2 (the ramp). */
void	scenario_shares(const struct scenario *, int epoch, double *share);

struct scenario_gen;

struct scenario_gen *scenario_gen_new(const struct scenario *, uint64_t seed);
void	scenario_gen_free(struct scenario_gen *);
/* The next record; 1, or 0 at the end of the stream. */
int	scenario_next(struct scenario_gen *, struct record *);
/* Units emitted so far, and records so far. */
uint64_t scenario_units(const struct scenario_gen *);
uint64_t scenario_emitted(const struct scenario_gen *);
/*
 * Draw one unit's value of metric m for arm (treated: the effect applies)
 * without emitting records: a pilot sample for planning figures. For
 * observe metrics *x is set; for count metrics *k and *n.
 */
void	scenario_draw(struct scenario_gen *, int m, int treated, double *x,
	    double *k, double *n);

/* splitmix64 (Steele, Lea & Flood 2014): derive per-run seeds. */
uint64_t scenario_mix(uint64_t);

#endif
