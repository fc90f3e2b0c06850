/*
 * simulate.h: what simulate.c (the runs) and simreport.c (the figures)
 * share: per-run results, the tests as the simulator sees them, and the
 * simulation itself. Internal to `stopcock simulate`.
 */
#ifndef STOPCOCK_SIMULATE_H
#define STOPCOCK_SIMULATE_H

#include <stdint.h>
#include <stdio.h>

#include <jansson.h>

#include "stopcock/conf.h"
#include "stopcock/engine.h"
#include "stopcock/sketch.h"
#include "stopcock/tally.h"
#include "scenario.h"

#define SIM_TESTS_MAX	64	/* guardrails x treatment arms */
#define SIM_LOOKS_MAX	100
#define SIM_RUNS_MAX	10000000
#define SIM_JOBS_MAX	256
#define SIM_PILOT	200000	/* units per arm for planning figures */
#define SIM_Z3		3.0	/* Monte Carlo bound: level + 3 SE */

struct sim_test_res {
	uint64_t	harm_rec;	/* record of the first harm; 0: none */
	uint64_t	harm_units;
	uint64_t	safe_rec;
	uint8_t		naive;		/* naive test rejected at some look */
	uint8_t		cov_miss;	/* CS excluded the truth */
};

struct sim_run {
	struct sim_test_res t[SIM_TESTS_MAX];
	uint64_t	srm_rec, srm_units;
	uint64_t	refused;	/* records the engine refused */
	uint8_t		srm_naive;
	uint8_t		any_false;	/* harm on a test without an effect */
};

/* One guardrail x treatment arm, as the simulator sees it. */
struct sim_test {
	int		 g;		/* conf guardrail */
	int		 arm;		/* treatment arm index */
	int		 metric;	/* scenario metric */
	int		 effect;	/* the metric has an effect on this arm */
	double		 level;		/* alpha / family, read from the engine */
	double		 fixed_units;	/* fixed-horizon total units */
	double		 truth_known;	/* 1: truth 0 (no effect) */
};

/* The naive analyst's running tallies, pooled over the stream. */
struct sim_naive {
	struct tally_moments	 m[SCENARIO_METRICS_MAX][PROTO_PLAN_MAX];
	struct tally_ratio	 r[SCENARIO_METRICS_MAX][PROTO_PLAN_MAX];
	struct sketch		*sk[SCENARIO_METRICS_MAX][PROTO_PLAN_MAX];
	struct sketch		*pool;
	double			 exposed[PROTO_PLAN_MAX];	/* this plan */
	double			 theta0[PROTO_PLAN_MAX];
};

struct sim {
	const struct conf *conf;
	struct scenario	 s;
	uint64_t	 seed, runs;
	int		 jobs, looks, json, tty;
	uint64_t	 tick_every;
	double		 power;
	int		 ntests;
	struct sim_test	 t[SIM_TESTS_MAX];
	double		 srm_level;
	double		 alpha_total;	/* the experiment's alpha */
	double		 srm_fixed_units;
	struct sim_run	*res;		/* shared: [runs] */
	volatile uint64_t *done;	/* shared progress counter */

	/* the run in progress (per process) */
	struct engine	*eng;
	struct scenario_gen *gen;
	struct sim_run	*cur;
	struct sim_naive *nv;
};

/* simreport.c: the figures as JSON, and as text rendered from it. */
json_t	*simreport_json(const struct sim *, double alpha_total);
void	 simreport_print(const struct sim *, const json_t *, FILE *);

#endif
