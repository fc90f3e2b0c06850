/*
 * simulate.c: `stopcock simulate -c CONF [options]`, the planning
 * simulator. It draws synthetic experiments from the scenario generator
 * (scenario.c, the same one `stopcock generate` prints) and runs each
 * through the real engine in memory, exactly as the daemon and replay do:
 * engine_apply after every record, engine_tick every tick. Per guardrail
 * test it reports:
 *
 *   - the false-alarm rate over runs where the test's metric has no
 *     effect (A/A), with its Monte Carlo standard error and the bound
 *     level + 3 SE that a valid test must stay under;
 *   - with an effect: the detection probability and the median and 90th
 *     percentile time to a harm verdict, in records and in seconds at
 *     the traffic rate, beside the fixed-horizon sample size for the
 *     same power at the same effect (stats_fixed_n, a one-look figure);
 *   - a naive analyst's test repeated at K equally spaced looks on the
 *     same streams (a two-sided Wald z-test at the same level), which
 *     shows the inflation that peeking causes (Armitage, McPherson & Rowe
 *     1969; METHODS.md sec. 8);
 *   - the coverage of the confidence sequence when the truth is known
 *     (no effect on the metric: the difference is 0).
 *
 * Runs are independent: run i draws from a seed derived from the master
 * seed and i, and writes its result into slot i of a shared table, so
 * the figures are the same for any -j. Workers are fork()ed processes.
 */
#include <errno.h>
#include <getopt.h>
#include <math.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/mman.h>
#include <sys/wait.h>
#include <time.h>
#include <unistd.h>

#include <jansson.h>

#include "stopcock/conf.h"
#include "stopcock/engine.h"
#include "stopcock/sketch.h"
#include "stopcock/stats.h"
#include "stopcock/tally.h"
#include "stopcock/util.h"
#include "cli.h"
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

/* ---- one run ---- */

static int
sim_test_index(const struct sim *sim, const struct finding *f)
{
	int i;

	for (i = 0; i < sim->ntests; i++)
		if (strcmp(sim->conf->guardrails[sim->t[i].g].name,
		    f->guardrail) == 0 && f->variant != NULL &&
		    strcmp(sim->s.arms[sim->t[i].arm].name, f->variant) == 0)
			return i;
	return -1;
}

static void
sim_sink(void *arg, const struct finding *f)
{
	struct sim *sim = arg;
	struct sim_run *r = sim->cur;
	int i;

	if (f->kind == FINDING_SRM) {
		if (r->srm_rec == 0) {
			r->srm_rec = f->event;
			r->srm_units = scenario_units(sim->gen);
		}
		return;
	}
	if (f->kind != FINDING_VERDICT || (i = sim_test_index(sim, f)) < 0)
		return;
	if (f->verdict == VERDICT_HARM && r->t[i].harm_rec == 0) {
		r->t[i].harm_rec = f->event;
		r->t[i].harm_units = scenario_units(sim->gen);
		if (!sim->t[i].effect)
			r->any_false = 1;
	} else if (f->verdict == VERDICT_SAFE && r->t[i].safe_rec == 0)
		r->t[i].safe_rec = f->event;
}

/* Read each test's level and the SRM level from the engine itself. */
static void
sim_levels_cb(void *arg, const struct finding *f)
{
	struct sim *sim = arg;
	int i;

	if (f->kind == FINDING_SRM)
		sim->srm_level = f->alpha;
	else if ((i = sim_test_index(sim, f)) >= 0) {
		sim->t[i].level = f->alpha;
		sim->alpha_total = f->alpha_total;
	}
}

/* Coverage: with no effect on the metric the true difference is 0. */
static void
sim_cover_cb(void *arg, const struct finding *f)
{
	struct sim *sim = arg;
	int i;

	if (f->kind != FINDING_VERDICT || (i = sim_test_index(sim, f)) < 0 ||
	    !sim->t[i].truth_known)
		return;
	if (f->lower > 0 || f->upper < 0)
		sim->cur->t[i].cov_miss = 1;
}

/* Share of a sketch's mass strictly above x. */
static double
sim_above(const struct sketch *sk, double x, double *n)
{
	size_t i, k, cap = sketch_nbuckets(sk) + 1;
	double *v = xreallocarray(NULL, cap, sizeof *v), above = 0;
	uint64_t *c = xreallocarray(NULL, cap, sizeof *c);

	k = sketch_buckets(sk, v, c, cap);
	*n = 0;
	for (i = 0; i < k; i++) {
		*n += (double)c[i];
		if (v[i] > x)
			above += (double)c[i];
	}
	free(v);
	free(c);
	return above;
}

static void
sim_naive_look(struct sim *sim)
{
	struct sim_naive *nv = sim->nv;
	const struct conf_guardrail *g;
	struct sim_run *r = sim->cur;
	double est, V, p, x, xa, xb, na, nb, x2;
	int i, mi, b;

	for (i = 0; i < sim->ntests; i++) {
		g = &sim->conf->guardrails[sim->t[i].g];
		mi = sim->t[i].metric;
		b = sim->t[i].arm;
		p = 1;
		switch (g->test) {
		case TEST_MEAN:
			if (nv->m[mi][0].n < 2 || nv->m[mi][b].n < 2)
				break;
			est = nv->m[mi][b].mean - nv->m[mi][0].mean;
			V = tally_moments_var(&nv->m[mi][0]) /
			    (double)nv->m[mi][0].n +
			    tally_moments_var(&nv->m[mi][b]) /
			    (double)nv->m[mi][b].n;
			p = stats_ztest(est, V, NULL);
			break;
		case TEST_PROPORTION:
		case TEST_RATE:
			if (nv->r[mi][0].records < 2 ||
			    nv->r[mi][b].records < 2)
				break;
			/* delta-method variance: the engine's tally */
			est = tally_ratio_rate(&nv->r[mi][b]) -
			    tally_ratio_rate(&nv->r[mi][0]);
			V = tally_ratio_var(&nv->r[mi][0]) +
			    tally_ratio_var(&nv->r[mi][b]);
			p = stats_ztest(est, V, NULL);
			break;
		case TEST_QUANTILE:
			/* two-proportion z-test of the shares above the
			 * pooled quantile (a one-look median-type test) */
			if (nv->sk[mi][0] == NULL ||
			    sketch_count(nv->sk[mi][0]) == 0 ||
			    sketch_count(nv->sk[mi][b]) == 0)
				break;
			sketch_reset(nv->pool);
			sketch_merge(nv->pool, nv->sk[mi][0]);
			sketch_merge(nv->pool, nv->sk[mi][b]);
			x = sketch_quantile(nv->pool, g->quantile);
			xa = sim_above(nv->sk[mi][0], x, &na);
			xb = sim_above(nv->sk[mi][b], x, &nb);
			p = stats_ztest_prop(xa, na, xb, nb, NULL);
			break;
		}
		if (p <= sim->t[i].level)
			r->t[i].naive = 1;
	}
	if (stats_srm_chi2(sim->s.narms, nv->exposed, nv->theta0, &x2) <=
	    sim->srm_level)
		r->srm_naive = 1;
}

static void
sim_naive_add(struct sim *sim, const struct record *rec)
{
	struct sim_naive *nv = sim->nv;
	double sum = 0;
	int i, mi, arm;

	if (rec->kind == PROTO_PLAN) {
		/* the chi-square compares with the weights in force */
		for (i = 0; i < rec->narms; i++)
			sum += rec->arms[i].weight;
		for (i = 0; i < rec->narms; i++) {
			nv->theta0[i] = rec->arms[i].weight / sum;
			nv->exposed[i] = 0;
		}
		return;
	}
	if ((arm = scenario_arm(&sim->s, rec->variant)) < 0)
		return;
	if (rec->kind == PROTO_EXPOSE) {
		nv->exposed[arm] += (double)rec->units;
		return;
	}
	if ((mi = scenario_metric_find(&sim->s, rec->metric)) < 0)
		return;
	if (rec->kind == PROTO_OBSERVE) {
		tally_moments_add(&nv->m[mi][arm], rec->value);
		if (nv->sk[mi][arm] != NULL)
			sketch_add(nv->sk[mi][arm], rec->value, 1);
	} else
		tally_ratio_add(&nv->r[mi][arm], rec->k, rec->n);
}

static void
sim_naive_reset(struct sim *sim)
{
	struct sim_naive *nv = sim->nv;
	int i, j;

	memset(nv->m, 0, sizeof nv->m);
	memset(nv->r, 0, sizeof nv->r);
	memset(nv->exposed, 0, sizeof nv->exposed);
	for (i = 0; i < sim->s.nmetrics; i++)
		for (j = 0; j < sim->s.narms; j++)
			if (nv->sk[i][j] != NULL)
				sketch_reset(nv->sk[i][j]);
}

static uint64_t
sim_run_seed(uint64_t master, uint64_t run)
{
	return scenario_mix(master ^ scenario_mix(run + 1));
}

static void
sim_run_one(struct sim *sim, uint64_t run)
{
	struct record rec;
	uint8_t key[16] = { 0 };
	uint64_t i = 0, look[SIM_LOOKS_MAX + 1];
	int k, nextlook = 0;
	double now = 0;

	sim->cur = &sim->res[run];
	memset(sim->cur, 0, sizeof *sim->cur);
	sim->gen = scenario_gen_new(&sim->s, sim_run_seed(sim->seed, run));
	sim->eng = engine_new(sim->conf, key);
	engine_set_sink(sim->eng, sim_sink, sim);
	sim_naive_reset(sim);
	for (k = 0; k < sim->looks; k++)
		look[k] = sim->s.records * (uint64_t)(k + 1) /
		    (uint64_t)sim->looks;
	while (scenario_next(sim->gen, &rec)) {
		i++;
		now = rec.has_ts ? rec.ts : (double)i;
		if (engine_apply(sim->eng, &rec, now, i) != ENGINE_OK)
			sim->cur->refused++;
		sim_naive_add(sim, &rec);
		if (i % sim->tick_every == 0) {
			engine_tick(sim->eng, now);
			engine_foreach_in(sim->eng, sim->s.experiment,
			    sim_cover_cb, sim);
		}
		if (nextlook < sim->looks && i == look[nextlook]) {
			sim_naive_look(sim);
			nextlook++;
		}
	}
	/* as replay ends: every test looks at the final data */
	engine_finish(sim->eng, now);
	engine_foreach_in(sim->eng, sim->s.experiment, sim_cover_cb, sim);
	engine_free(sim->eng);
	scenario_gen_free(sim->gen);
	sim->eng = NULL;
	sim->gen = NULL;
}

/* ---- planning figures ---- */

/* Fixed-horizon total units for every test with an effect (one look,
 * one-sided at the test's level, equal to a two-sided 2 x level test). */
static void
sim_fixed(struct sim *sim)
{
	struct scenario_gen *gen;
	struct tally_moments mm[2];
	struct tally_ratio rr[2];
	struct sketch *sk[2];
	const struct conf_guardrail *g;
	struct sim_test *t;
	double share[PROTO_PLAN_MAX], x, k, n, va, vb, ma, mb, d, s, m, thr;
	double above, na, q, p0;
	int i, arm, j;

	scenario_shares(&sim->s, sim->s.ramp_at > 0 ? 2 : 1, share);
	for (i = 0; i < sim->ntests; i++) {
		t = &sim->t[i];
		t->fixed_units = NAN;
		if (!t->effect)
			continue;
		g = &sim->conf->guardrails[t->g];
		memset(mm, 0, sizeof mm);
		memset(rr, 0, sizeof rr);
		sk[0] = sketch_new(sim->conf->sketch_accuracy, 1 << 16);
		sk[1] = sketch_new(sim->conf->sketch_accuracy, 1 << 16);
		for (arm = 0; arm < 2; arm++) {
			/* common random numbers: both arms draw the same
			 * stream, so the pilot's effect is the model's, not
			 * the model's plus sampling noise */
			gen = scenario_gen_new(&sim->s, scenario_mix(sim->seed ^
			    0x5eed0f1a2b3c4d5eULL));
			for (j = 0; j < SIM_PILOT; j++) {
				scenario_draw(gen, t->metric, arm, &x, &k, &n);
				if (g->test == TEST_MEAN ||
				    g->test == TEST_QUANTILE) {
					tally_moments_add(&mm[arm], x);
					sketch_add(sk[arm], x, 1);
				} else
					tally_ratio_add(&rr[arm], k, n);
			}
			scenario_gen_free(gen);
		}
		s = g->harm == HARM_INCREASE ? 1 : -1;
		if (g->test == TEST_MEAN) {
			ma = mm[0].mean;
			mb = mm[1].mean;
			va = tally_moments_var(&mm[0]);
			vb = tally_moments_var(&mm[1]);
		} else if (g->test != TEST_QUANTILE) {
			ma = tally_ratio_rate(&rr[0]);
			mb = tally_ratio_rate(&rr[1]);
			va = tally_ratio_var(&rr[0]) * SIM_PILOT;
			vb = tally_ratio_var(&rr[1]) * SIM_PILOT;
		} else {
			/* shares beyond the margin-shifted control quantile */
			q = g->quantile;
			ma = sketch_quantile(sk[0], q);
			m = g->margin_relative ? g->margin * ma : g->margin;
			thr = ma + s * m;
			above = sim_above(sk[1], thr, &na) / na;
			p0 = 1 - q;
			if (s < 0) {
				above = 1 - above;
				p0 = q;
			}
			ma = p0;
			mb = above;
			va = q * (1 - q);
			vb = above * (1 - above);
			s = 1;
		}
		sketch_free(sk[0]);
		sketch_free(sk[1]);
		m = g->test == TEST_QUANTILE ? 0 : g->margin_relative ?
		    g->margin * fabs(ma) : g->margin;
		d = s * (mb - ma) - m;
		if (d > 0)
			t->fixed_units = stats_fixed_n(d, va / share[0],
			    vb / share[t->arm], 2 * t->level, sim->power);
		else {
			/* no harm beyond the margin: a harm verdict here
			 * would be a false alarm (the truth is not 0, so
			 * coverage stays unchecked) */
			t->fixed_units = INFINITY;
			t->effect = 0;
		}
	}
	sim->srm_fixed_units = NAN;
	if (sim->s.srm_loss > 0) {
		double plan[PROTO_PLAN_MAX], sum = 0;
		const struct proto_arm *pa = sim->s.ramp_at > 0 ?
		    sim->s.ramp_arms : sim->s.arms;

		for (i = 0; i < sim->s.narms; i++)
			sum += pa[i].weight;
		for (i = 0; i < sim->s.narms; i++)
			plan[i] = pa[i].weight / sum;
		j = sim->s.srm_arm;
		sim->srm_fixed_units = stats_fixed_n(share[j] - plan[j],
		    plan[j] * (1 - plan[j]), 0, sim->srm_level, sim->power);
	}
}

/* ---- workers ---- */

static void
sim_naive_new(struct sim *sim)
{
	struct sim_naive *nv = xcalloc(1, sizeof *nv);
	int i, j;

	for (i = 0; i < sim->ntests; i++) {
		if (sim->conf->guardrails[sim->t[i].g].test != TEST_QUANTILE)
			continue;
		for (j = 0; j < sim->s.narms; j++)
			if (nv->sk[sim->t[i].metric][j] == NULL)
				nv->sk[sim->t[i].metric][j] = sketch_new(
				    sim->conf->sketch_accuracy,
				    sim->conf->sketch_buckets);
	}
	nv->pool = sketch_new(sim->conf->sketch_accuracy,
	    sim->conf->sketch_buckets);
	sim->nv = nv;
}

static void
sim_naive_free(struct sim *sim)
{
	int i, j;

	for (i = 0; i < SCENARIO_METRICS_MAX; i++)
		for (j = 0; j < PROTO_PLAN_MAX; j++)
			sketch_free(sim->nv->sk[i][j]);
	sketch_free(sim->nv->pool);
	free(sim->nv);
	sim->nv = NULL;
}

static void
sim_work(struct sim *sim, int worker)
{
	uint64_t run;

	sim_naive_new(sim);
	for (run = (uint64_t)worker; run < sim->runs; run += (uint64_t)sim->jobs) {
		sim_run_one(sim, run);
		__atomic_add_fetch(sim->done, 1, __ATOMIC_RELAXED);
	}
	sim_naive_free(sim);
}

static void
sim_progress(const struct sim *sim, int final)
{
	uint64_t d = __atomic_load_n(sim->done, __ATOMIC_RELAXED);
	int i, w = 40, fill = (int)((double)w * (double)d /
	    (double)sim->runs);
	char bar[64];

	if (!sim->tty)
		return;
	for (i = 0; i < w; i++)
		bar[i] = i < fill ? '#' : '.';
	bar[w] = '\0';
	fprintf(stderr, "\rsimulate [%s] %llu/%llu runs", bar,
	    (unsigned long long)d, (unsigned long long)sim->runs);
	if (final)
		fputc('\n', stderr);
}

/* Run every run on jobs processes; 0, or -1 when a worker failed. */
static int
sim_run_all(struct sim *sim)
{
	struct timespec ts = { 0, 200 * 1000 * 1000 };
	pid_t pids[SIM_JOBS_MAX], pid;
	int i, live = 0, status, rc = 0;

	if (sim->jobs == 1) {
		sim_naive_new(sim);
		for (uint64_t run = 0; run < sim->runs; run++) {
			sim_run_one(sim, run);
			(*sim->done)++;
			if ((run & 15) == 0)
				sim_progress(sim, 0);
		}
		sim_naive_free(sim);
		sim_progress(sim, 1);
		return 0;
	}
	fflush(NULL);
	for (i = 0; i < sim->jobs; i++) {
		if ((pid = fork()) == -1) {
			fprintf(stderr, "stopcock simulate: fork: %s\n",
			    strerror(errno));
			rc = -1;
			break;
		}
		if (pid == 0) {
			sim_work(sim, i);
			_exit(0);
		}
		pids[live++] = pid;
	}
	while (live > 0) {
		pid = waitpid(-1, &status, WNOHANG);
		if (pid == -1 && errno != EINTR)
			break;
		if (pid > 0) {
			live--;
			if (!WIFEXITED(status) || WEXITSTATUS(status) != 0)
				rc = -1;
			continue;
		}
		sim_progress(sim, 0);
		nanosleep(&ts, NULL);
	}
	if (rc != 0)
		for (i = 0; i < sim->jobs && i < (int)SC_NELEM(pids); i++)
			kill(pids[i], SIGTERM);
	sim_progress(sim, 1);
	return rc;
}

/* ---- summary ---- */

struct sim_sum {
	uint64_t	harm, safe, naive, cov_n, cov_miss, refused;
	double		p50, p90, u50, u90;	/* records, units; NAN: beyond */
};

static int
sim_cmp_u64(const void *a, const void *b)
{
	uint64_t x = *(const uint64_t *)a, y = *(const uint64_t *)b;

	return x < y ? -1 : x > y;
}

/* The q-quantile of the detection times, undetected runs counting as
 * never (NAN when the quantile falls among them). */
static double
sim_time_quantile(uint64_t *v, uint64_t n, double q)
{
	uint64_t idx = (uint64_t)ceil(q * (double)n);

	if (idx == 0)
		idx = 1;
	return v[idx - 1] == UINT64_MAX ? NAN : (double)v[idx - 1];
}

/* i < 0: the SRM check. */
static void
sim_summarise(const struct sim *sim, int i, struct sim_sum *sum)
{
	uint64_t *rec = xreallocarray(NULL, sim->runs, sizeof *rec);
	uint64_t *units = xreallocarray(NULL, sim->runs, sizeof *units);
	uint64_t r, h, u;

	memset(sum, 0, sizeof *sum);
	for (r = 0; r < sim->runs; r++) {
		const struct sim_run *run = &sim->res[r];

		if (i < 0) {
			h = run->srm_rec;
			u = run->srm_units;
			sum->naive += run->srm_naive;
		} else {
			h = run->t[i].harm_rec;
			u = run->t[i].harm_units;
			sum->naive += run->t[i].naive;
			sum->safe += run->t[i].safe_rec != 0;
			if (sim->t[i].truth_known) {
				sum->cov_n++;
				sum->cov_miss += run->t[i].cov_miss;
			}
		}
		sum->refused += run->refused;
		sum->harm += h != 0;
		rec[r] = h ? h : UINT64_MAX;
		units[r] = h ? u : UINT64_MAX;
	}
	qsort(rec, sim->runs, sizeof *rec, sim_cmp_u64);
	qsort(units, sim->runs, sizeof *units, sim_cmp_u64);
	sum->p50 = sim_time_quantile(rec, sim->runs, 0.5);
	sum->p90 = sim_time_quantile(rec, sim->runs, 0.9);
	sum->u50 = sim_time_quantile(units, sim->runs, 0.5);
	sum->u90 = sim_time_quantile(units, sim->runs, 0.9);
	free(rec);
	free(units);
}

static double
sim_se(double p, uint64_t n)
{
	return n > 0 ? sqrt(p * (1 - p) / (double)n) : NAN;
}

/* JSON number or null. */
static json_t *
sim_num(double v)
{
	return isfinite(v) ? json_real(v) : json_null();
}

static double
sim_secs(const struct sim *sim, double records)
{
	return sim->s.rate > 0 ? records / sim->s.rate : NAN;
}

static void
sim_human_time(char *buf, size_t size, double secs)
{
	if (!isfinite(secs))
		snprintf(buf, size, "-");
	else if (secs < 120)
		snprintf(buf, size, "%.1f s", secs);
	else if (secs < 7200)
		snprintf(buf, size, "%.1f min", secs / 60);
	else if (secs < 172800)
		snprintf(buf, size, "%.1f h", secs / 3600);
	else
		snprintf(buf, size, "%.1f d", secs / 86400);
}

/* Records of a stream that holds this many units. */
static double
sim_units_to_records(const struct sim *sim, double units)
{
	return ceil(units) * scenario_records_per_unit(&sim->s) + 1;
}

static json_t *
sim_json_block(const struct sim *sim, const struct sim_sum *sum,
    int effect, double level, double fixed_units)
{
	json_t *o = json_object(), *x;
	double R = (double)sim->runs, rate = (double)sum->harm / R;
	double se0 = sqrt(level * (1 - level) / R), nr;

	json_object_set_new(o, "harm_runs", json_integer((json_int_t)sum->harm));
	json_object_set_new(o, "harm_rate", json_real(rate));
	json_object_set_new(o, "harm_se", sim_num(sim_se(rate, sim->runs)));
	if (!effect) {
		x = json_object();
		json_object_set_new(x, "rate", json_real(rate));
		json_object_set_new(x, "se", sim_num(sim_se(rate, sim->runs)));
		json_object_set_new(x, "level", json_real(level));
		json_object_set_new(x, "bound", json_real(level + SIM_Z3 * se0));
		json_object_set_new(x, "ok", json_boolean(rate <= level +
		    SIM_Z3 * se0));
		json_object_set_new(o, "false_alarm", x);
	} else {
		x = json_object();
		json_object_set_new(x, "probability", json_real(rate));
		json_object_set_new(x, "se", sim_num(sim_se(rate, sim->runs)));
		json_object_set_new(x, "median_records", sim_num(sum->p50));
		json_object_set_new(x, "p90_records", sim_num(sum->p90));
		json_object_set_new(x, "median_units", sim_num(sum->u50));
		json_object_set_new(x, "p90_units", sim_num(sum->u90));
		json_object_set_new(x, "median_seconds",
		    sim_num(sim_secs(sim, sum->p50)));
		json_object_set_new(x, "p90_seconds",
		    sim_num(sim_secs(sim, sum->p90)));
		json_object_set_new(o, "detection", x);
		x = json_object();
		nr = sim_units_to_records(sim, fixed_units);
		json_object_set_new(x, "power", json_real(sim->power));
		json_object_set_new(x, "units", sim_num(ceil(fixed_units)));
		json_object_set_new(x, "records", sim_num(nr));
		json_object_set_new(x, "seconds", sim_num(sim_secs(sim, nr)));
		json_object_set_new(o, "fixed_horizon", x);
	}
	x = json_object();
	rate = (double)sum->naive / R;
	json_object_set_new(x, "looks", json_integer(sim->looks));
	json_object_set_new(x, "rate", json_real(rate));
	json_object_set_new(x, "se", sim_num(sim_se(rate, sim->runs)));
	json_object_set_new(o, "naive", x);
	return o;
}

static json_t *
sim_arms_json(const struct proto_arm *arms, int narms)
{
	json_t *a = json_array(), *o;
	int i;

	for (i = 0; i < narms; i++) {
		o = json_object();
		json_object_set_new(o, "variant", json_string(arms[i].name));
		json_object_set_new(o, "weight", json_real(arms[i].weight));
		json_array_append_new(a, o);
	}
	return a;
}

static json_t *
sim_json(const struct sim *sim, double alpha_total)
{
	json_t *root = json_object(), *tests = json_array(), *o, *e;
	const struct conf_guardrail *g;
	const struct scenario_metric *m;
	struct sim_sum sum;
	uint64_t fam = 0, r, refused = 0;
	double R = (double)sim->runs, rate, se0;
	int i;

	json_object_set_new(root, "experiment", json_string(sim->s.experiment));
	json_object_set_new(root, "runs", json_integer((json_int_t)sim->runs));
	json_object_set_new(root, "records_per_run",
	    json_integer((json_int_t)sim->s.records));
	json_object_set_new(root, "records_per_unit",
	    json_integer(scenario_records_per_unit(&sim->s)));
	json_object_set_new(root, "rate", json_real(sim->s.rate));
	json_object_set_new(root, "tick_records",
	    json_integer((json_int_t)sim->tick_every));
	json_object_set_new(root, "seed", json_integer((json_int_t)sim->seed));
	json_object_set_new(root, "jobs", json_integer(sim->jobs));
	json_object_set_new(root, "arms", sim_arms_json(sim->s.arms,
	    sim->s.narms));
	if (sim->s.ramp_at > 0) {
		o = json_object();
		json_object_set_new(o, "at", json_real(sim->s.ramp_at));
		json_object_set_new(o, "arms", sim_arms_json(sim->s.ramp_arms,
		    sim->s.narms));
		json_object_set_new(root, "ramp", o);
	} else
		json_object_set_new(root, "ramp", json_null());
	json_object_set_new(root, "srm_loss", json_real(sim->s.srm_loss));
	for (i = 0; i < sim->ntests; i++) {
		g = &sim->conf->guardrails[sim->t[i].g];
		m = &sim->s.metrics[sim->t[i].metric];
		sim_summarise(sim, i, &sum);
		refused = sum.refused;
		o = sim_json_block(sim, &sum, sim->t[i].effect, sim->t[i].level,
		    sim->t[i].fixed_units);
		json_object_set_new(o, "guardrail", json_string(g->name));
		json_object_set_new(o, "metric", json_string(g->metric));
		json_object_set_new(o, "test", json_string(conf_test_name(g->test)));
		json_object_set_new(o, "quantile", g->test == TEST_QUANTILE ?
		    json_real(g->quantile) : json_null());
		json_object_set_new(o, "harm", json_string(g->harm ==
		    HARM_INCREASE ? "increase" : "decrease"));
		json_object_set_new(o, "margin", json_real(g->margin));
		json_object_set_new(o, "margin_relative",
		    json_boolean(g->margin_relative));
		json_object_set_new(o, "variant",
		    json_string(sim->s.arms[sim->t[i].arm].name));
		json_object_set_new(o, "level", json_real(sim->t[i].level));
		if (m->effect != 0 && sim->t[i].arm == sim->s.effect_arm) {
			/* the metric's effect; "false_alarm" above when it
			 * stays inside the margin */
			e = json_object();
			json_object_set_new(e, "value", json_real(m->effect));
			json_object_set_new(e, "relative",
			    json_boolean(m->effect_relative));
			json_object_set_new(e, "above", m->effect_above > 0 ?
			    json_real(m->effect_above) : json_null());
			json_object_set_new(o, "effect", e);
		} else
			json_object_set_new(o, "effect", json_null());
		json_object_set_new(o, "safe_rate", json_real((double)sum.safe /
		    R));
		if (sum.cov_n > 0) {
			e = json_object();
			rate = 1 - (double)sum.cov_miss / (double)sum.cov_n;
			json_object_set_new(e, "rate", json_real(rate));
			json_object_set_new(e, "se", json_real(sim_se(rate,
			    sum.cov_n)));
			json_object_set_new(e, "runs",
			    json_integer((json_int_t)sum.cov_n));
			json_object_set_new(e, "target", json_real(1 -
			    sim->t[i].level));
			json_object_set_new(o, "coverage", e);
		} else
			json_object_set_new(o, "coverage", json_null());
		json_array_append_new(tests, o);
	}
	json_object_set_new(root, "tests", tests);
	sim_summarise(sim, -1, &sum);
	refused = sum.refused;
	o = sim_json_block(sim, &sum, sim->s.srm_loss > 0, sim->srm_level,
	    sim->srm_fixed_units);
	json_object_set_new(o, "level", json_real(sim->srm_level));
	json_object_set_new(root, "srm", o);
	for (r = 0; r < sim->runs; r++)
		fam += sim->res[r].any_false;
	o = json_object();
	rate = (double)fam / R;
	se0 = sqrt(alpha_total * (1 - alpha_total) / R);
	json_object_set_new(o, "alpha", json_real(alpha_total));
	json_object_set_new(o, "false_alarm_rate", json_real(rate));
	json_object_set_new(o, "se", sim_num(sim_se(rate, sim->runs)));
	json_object_set_new(o, "bound", json_real(alpha_total + SIM_Z3 * se0));
	json_object_set_new(root, "family", o);
	json_object_set_new(root, "refused_records",
	    json_integer((json_int_t)refused));
	return root;
}

/* ---- text report (rendered from the JSON, so both agree) ---- */

static double
jnum(const json_t *o, const char *key)
{
	const json_t *v = json_object_get(o, key);

	return json_is_number(v) ? json_number_value(v) : NAN;
}

static void
sim_print_block(const struct sim *sim, const json_t *o, FILE *fp)
{
	const json_t *x;
	char t50[32], t90[32];

	if ((x = json_object_get(o, "false_alarm")) != NULL)
		fprintf(fp, "  false alarms      %.4f +- %.4f  (a valid test "
		    "stays <= %.4f: %s)\n", jnum(x, "rate"), jnum(x, "se"),
		    jnum(x, "bound"), json_is_true(json_object_get(x, "ok")) ?
		    "ok" : "EXCEEDED");
	if ((x = json_object_get(o, "detection")) != NULL) {
		fprintf(fp, "  detected          %.4f +- %.4f  within %llu "
		    "records\n", jnum(x, "probability"), jnum(x, "se"),
		    (unsigned long long)sim->s.records);
		sim_human_time(t50, sizeof t50, jnum(x, "median_seconds"));
		sim_human_time(t90, sizeof t90, jnum(x, "p90_seconds"));
		if (isfinite(jnum(x, "median_records")))
			fprintf(fp, "  time to harm      median %.0f records "
			    "(%s), 90th percentile ", jnum(x, "median_records"),
			    t50);
		else
			fprintf(fp, "  time to harm      median beyond the "
			    "horizon, 90th percentile ");
		if (isfinite(jnum(x, "p90_records")))
			fprintf(fp, "%.0f records (%s)\n", jnum(x,
			    "p90_records"), t90);
		else
			fprintf(fp, "beyond the horizon\n");
		x = json_object_get(o, "fixed_horizon");
		sim_human_time(t50, sizeof t50, jnum(x, "seconds"));
		if (isfinite(jnum(x, "records")))
			fprintf(fp, "  fixed horizon     %.0f records (%s) for "
			    "%.0f%% power, one look only\n", jnum(x, "records"),
			    t50, 100 * sim->power);
		else
			fprintf(fp, "  fixed horizon     none: the effect does "
			    "not exceed the margin\n");
	}
	x = json_object_get(o, "naive");
	snprintf(t50, sizeof t50, "naive, %d looks", sim->looks);
	fprintf(fp, "  %-17s %.4f +- %.4f  (z-test at the same level at "
	    "each look)\n", t50, jnum(x, "rate"), jnum(x, "se"));
}

static void
sim_print(const struct sim *sim, const json_t *root, FILE *fp)
{
	const json_t *t, *x;
	size_t i;
	int j;

	fprintf(fp, "stopcock simulate: %llu runs of %llu records, seed "
	    "%llu, %d job%s\n", (unsigned long long)sim->runs,
	    (unsigned long long)sim->s.records,
	    (unsigned long long)sim->seed, sim->jobs, sim->jobs > 1 ? "s" : "");
	fprintf(fp, "plan:");
	for (j = 0; j < sim->s.narms; j++)
		fprintf(fp, " %s=%g", sim->s.arms[j].name,
		    sim->s.arms[j].weight);
	if (sim->s.ramp_at > 0) {
		fprintf(fp, ", after %g of the records", sim->s.ramp_at);
		for (j = 0; j < sim->s.narms; j++)
			fprintf(fp, " %s=%g", sim->s.ramp_arms[j].name,
			    sim->s.ramp_arms[j].weight);
	}
	fprintf(fp, "; %d records per unit; %g records/s; tick every %llu "
	    "records\n", scenario_records_per_unit(&sim->s), sim->s.rate,
	    (unsigned long long)sim->tick_every);
	json_array_foreach(json_object_get(root, "tests"), i, t) {
		fprintf(fp, "\n%s on %s: %s", json_string_value(
		    json_object_get(t, "guardrail")), json_string_value(
		    json_object_get(t, "variant")), json_string_value(
		    json_object_get(t, "test")));
		if (isfinite(jnum(t, "quantile")))
			fprintf(fp, " %g", jnum(t, "quantile"));
		fprintf(fp, " of %s, level %.4g\n", json_string_value(
		    json_object_get(t, "metric")), jnum(t, "level"));
		sim_print_block(sim, t, fp);
		if ((x = json_object_get(t, "coverage")) != NULL &&
		    !json_is_null(x))
			fprintf(fp, "  CS coverage       %.4f +- %.4f  (target "
			    ">= %.4f)\n", jnum(x, "rate"), jnum(x, "se"),
			    jnum(x, "target"));
	}
	t = json_object_get(root, "srm");
	fprintf(fp, "\nsample ratio mismatch, level %.4g\n", jnum(t, "level"));
	sim_print_block(sim, t, fp);
	t = json_object_get(root, "family");
	fprintf(fp, "\nany false alarm in the experiment: %.4f +- %.4f "
	    "(alpha %.4g, bound %.4f)\n", jnum(t, "false_alarm_rate"),
	    jnum(t, "se"), jnum(t, "alpha"), jnum(t, "bound"));
	if (jnum(root, "refused_records") > 0)
		fprintf(fp, "warning: the engine refused %.0f records\n",
		    jnum(root, "refused_records"));
}

/* ---- the command ---- */

static void
sim_usage(FILE *fp)
{
	fprintf(fp, "usage: stopcock simulate [-c CONF] [options]\n"
	    "  -c CONF              configuration: guardrails, alpha, "
	    "plan_units\n"
	    "  --runs N             simulated experiments (default 200)\n"
	    "  --horizon N          records per run (same as --records; "
	    "default:\n"
	    "                       plan_units per arm)\n"
	    "  --tick N             records between engine ticks (default: "
	    "the\n"
	    "                       configured tick at --rate)\n"
	    "  --looks K            looks of the naive repeated z-test "
	    "(default 5)\n"
	    "  --power P            power of the fixed-horizon size (default "
	    "0.8)\n"
	    "  --seed S             master seed (default 1)\n"
	    "  -j N                 worker processes (0: one per CPU); results "
	    "do not\n"
	    "                       depend on N\n"
	    "  --json               machine-readable output\n"
	    "%s", scenario_help);
}

static void
sim_tests(struct sim *sim)
{
	const struct conf *c = sim->conf;
	const struct scenario_metric *m;
	struct sim_test *t;
	int g, a;

	sim->ntests = 0;
	for (g = 0; g < c->nguardrails; g++)
		for (a = 1; a < sim->s.narms; a++) {
			t = &sim->t[sim->ntests++];
			memset(t, 0, sizeof *t);
			t->g = g;
			t->arm = a;
			t->metric = scenario_metric_find(&sim->s,
			    c->guardrails[g].metric);
			m = &sim->s.metrics[t->metric];
			t->effect = m->effect != 0 && a == sim->s.effect_arm;
			t->truth_known = !t->effect;
			t->level = NAN;
		}
}

/* Apply the plan to a scratch engine and read the levels it uses. */
static double
sim_levels(struct sim *sim)
{
	struct scenario_gen *gen = scenario_gen_new(&sim->s, 1);
	uint8_t key[16] = { 0 };
	struct record rec;
	struct engine *eng = engine_new(sim->conf, key);
	int i;

	if (scenario_next(gen, &rec))
		engine_apply(eng, &rec, rec.ts, 1);
	engine_foreach_in(eng, sim->s.experiment, sim_levels_cb, sim);
	engine_free(eng);
	scenario_gen_free(gen);
	for (i = 0; i < sim->ntests; i++)
		if (!isfinite(sim->t[i].level))
			return NAN;
	return sim->alpha_total;
}

int
cmd_simulate(int argc, char **argv)
{
	static const struct option longopts[] = {
		SCENARIO_LONGOPTS,
		{ "horizon", required_argument, NULL, SOPT_RECORDS },
		{ "runs", required_argument, NULL, 'r' },
		{ "tick", required_argument, NULL, 't' },
		{ "looks", required_argument, NULL, 'k' },
		{ "power", required_argument, NULL, 'p' },
		{ "seed", required_argument, NULL, 'S' },
		{ "json", no_argument, NULL, 'J' },
		{ "config", required_argument, NULL, 'c' },
		{ "help", no_argument, NULL, 'h' },
		{ NULL, 0, NULL, 0 }
	};
	const char *confpath = "/etc/stopcock/stopcock.conf";
	const struct conf_experiment *ce;
	struct scenario_opts o;
	struct sim sim;
	struct conf *conf;
	char *cause = NULL;
	uint64_t u;
	double plan_units, alpha_total;
	size_t mapsize;
	void *map;
	json_t *root;
	int ch, rc;

	memset(&sim, 0, sizeof sim);
	memset(&o, 0, sizeof o);
	scenario_init(&sim.s);
	snprintf(sim.s.experiment, sizeof sim.s.experiment, "sim");
	scenario_preset(&sim.s, argc, argv);
	sim.s.records = 0;
	sim.seed = 1;
	sim.runs = 200;
	sim.jobs = 1;
	sim.looks = 5;
	sim.power = 0.8;
	optind = 1;
	while ((ch = getopt_long(argc, argv, "c:j:h", longopts, NULL)) != -1) {
		switch (ch) {
		case 'c':
			confpath = optarg;
			break;
		case 'r':
			if (parse_u64(optarg, SIM_RUNS_MAX, &sim.runs) != 0 ||
			    sim.runs == 0)
				goto bad;
			break;
		case 't':
			if (parse_u64(optarg, UINT64_C(1) << 40,
			    &sim.tick_every) != 0 || sim.tick_every == 0)
				goto bad;
			break;
		case 'k':
			if (parse_u64(optarg, SIM_LOOKS_MAX, &u) != 0 || u == 0)
				goto bad;
			sim.looks = (int)u;
			break;
		case 'p':
			if (parse_double(optarg, 0.01, 0.999, &sim.power) != 0)
				goto bad;
			break;
		case 'S':
			if (parse_u64(optarg, UINT64_MAX, &sim.seed) != 0)
				goto bad;
			break;
		case 'j':
			if (parse_u64(optarg, SIM_JOBS_MAX, &u) != 0)
				goto bad;
			sim.jobs = u == 0 ? (int)sysconf(_SC_NPROCESSORS_ONLN) :
			    (int)u;
			if (sim.jobs < 1)
				sim.jobs = 1;
			break;
		case 'J':
			sim.json = 1;
			break;
		case 'h':
			sim_usage(stdout);
			return SC_EX_OK;
		default:
			if (ch >= SOPT_EXPERIMENTS && ch < SOPT_LAST) {
				if (scenario_option(&sim.s, &o, ch, optarg,
				    &cause) == 0)
					break;
				fprintf(stderr, "stopcock simulate: %s\n",
				    cause);
				free(cause);
				return SC_EX_USAGE;
			}
			sim_usage(stderr);
			return SC_EX_USAGE;
		}
	}
	if (optind != argc) {
		sim_usage(stderr);
		return SC_EX_USAGE;
	}
	if (sim.s.nexperiments != 1) {
		fprintf(stderr, "stopcock simulate: a run is one experiment; "
		    "use --runs\n");
		return SC_EX_USAGE;
	}
	if (conf_load(confpath, &conf, &cause) != 0) {
		fprintf(stderr, "%s\n", cause);
		free(cause);
		return SC_EX_CONFIG;
	}
	sim.conf = conf;
	rc = SC_EX_USAGE;
	if (conf->nguardrails == 0) {
		fprintf(stderr, "stopcock simulate: %s has no guardrails\n",
		    confpath);
		goto out;
	}
	if (sim.s.records == 0)
		sim.s.records = 2;	/* placeholder until metrics are known */
	u = sim.s.records;
	if (scenario_finish(&sim.s, conf, &o, &cause) != 0) {
		fprintf(stderr, "stopcock simulate: %s\n", cause);
		free(cause);
		goto out;
	}
	if (u == 2) {
		/* default horizon: the planned units of every arm */
		ce = conf_experiment_find(conf, sim.s.experiment);
		plan_units = ce && ce->plan_units > 0 ? ce->plan_units :
		    conf->plan_units;
		sim.s.records = (uint64_t)(plan_units * sim.s.narms) *
		    (uint64_t)scenario_records_per_unit(&sim.s) + 1;
	}
	if (conf->nguardrails * (sim.s.narms - 1) > SIM_TESTS_MAX) {
		fprintf(stderr, "stopcock simulate: at most %d guardrail x "
		    "arm tests\n", SIM_TESTS_MAX);
		goto out;
	}
	if (sim.tick_every == 0) {
		sim.tick_every = sim.s.rate > 0 ? (uint64_t)llround(
		    sim.s.rate * conf->tick) : 1000;
		if (sim.tick_every == 0)
			sim.tick_every = 1;
	}
	sim.tty = isatty(STDERR_FILENO);
	sim_tests(&sim);
	if (!isfinite(alpha_total = sim_levels(&sim))) {
		fprintf(stderr, "stopcock simulate: the engine did not take "
		    "the plan (check max_variants and max_experiments)\n");
		rc = SC_EX_SOFTWARE;
		goto out;
	}
	sim_fixed(&sim);

	mapsize = sizeof(struct sim_run) * sim.runs + 64;
	map = mmap(NULL, mapsize, PROT_READ | PROT_WRITE,
	    MAP_SHARED | MAP_ANONYMOUS, -1, 0);
	if (map == MAP_FAILED) {
		fprintf(stderr, "stopcock simulate: mmap: %s\n",
		    strerror(errno));
		rc = SC_EX_OSERR;
		goto out;
	}
	sim.done = map;
	sim.res = (struct sim_run *)((char *)map + 64);
	if (sim_run_all(&sim) != 0) {
		fprintf(stderr, "stopcock simulate: a worker failed\n");
		rc = SC_EX_SOFTWARE;
	} else {
		root = sim_json(&sim, alpha_total);
		if (sim.json) {
			json_dumpf(root, stdout, JSON_INDENT(2) |
			    JSON_REAL_PRECISION(8));
			fputc('\n', stdout);
		} else
			sim_print(&sim, root, stdout);
		json_decref(root);
		rc = fflush(stdout) == 0 ? SC_EX_OK : SC_EX_IOERR;
	}
	munmap(map, mapsize);
out:
	conf_free(conf);
	return rc;
bad:
	fprintf(stderr, "stopcock simulate: bad value '%s'\n", optarg);
	return SC_EX_USAGE;
}
