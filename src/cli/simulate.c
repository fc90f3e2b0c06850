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
 *     1969; docs/methods.md sec. 8);
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

#include "simulate.h"

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

/* The defaults before options: 200 runs of one experiment, 5 looks. */
static void
sim_defaults(struct sim *sim, struct scenario_opts *o, int argc,
    char **argv)
{
	memset(sim, 0, sizeof *sim);
	memset(o, 0, sizeof *o);
	scenario_init(&sim->s);
	snprintf(sim->s.experiment, sizeof sim->s.experiment, "sim");
	scenario_preset(&sim->s, argc, argv);
	sim->s.records = 0;
	sim->seed = 1;
	sim->runs = 200;
	sim->jobs = 1;
	sim->looks = 5;
	sim->power = 0.8;
}

/* The command line into sim and o. -1 to go on, else the exit code. */
static int
sim_options(struct sim *sim, struct scenario_opts *o, int argc, char **argv,
    const char **confpath)
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
	char *cause = NULL;
	uint64_t u;
	int ch;

	optind = 1;
	while ((ch = getopt_long(argc, argv, "c:j:h", longopts, NULL)) != -1) {
		switch (ch) {
		case 'c':
			*confpath = optarg;
			break;
		case 'r':
			if (parse_u64(optarg, SIM_RUNS_MAX, &sim->runs) != 0 ||
			    sim->runs == 0)
				goto bad;
			break;
		case 't':
			if (parse_u64(optarg, UINT64_C(1) << 40,
			    &sim->tick_every) != 0 || sim->tick_every == 0)
				goto bad;
			break;
		case 'k':
			if (parse_u64(optarg, SIM_LOOKS_MAX, &u) != 0 || u == 0)
				goto bad;
			sim->looks = (int)u;
			break;
		case 'p':
			if (parse_double(optarg, 0.01, 0.999, &sim->power) != 0)
				goto bad;
			break;
		case 'S':
			if (parse_u64(optarg, UINT64_MAX, &sim->seed) != 0)
				goto bad;
			break;
		case 'j':
			if (parse_u64(optarg, SIM_JOBS_MAX, &u) != 0)
				goto bad;
			sim->jobs = u == 0 ?
			    (int)sysconf(_SC_NPROCESSORS_ONLN) : (int)u;
			if (sim->jobs < 1)
				sim->jobs = 1;
			break;
		case 'J':
			sim->json = 1;
			break;
		case 'h':
			sim_usage(stdout);
			return SC_EX_OK;
		default:
			if (ch >= SOPT_EXPERIMENTS && ch < SOPT_LAST) {
				if (scenario_option(&sim->s, o, ch, optarg,
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
	if (sim->s.nexperiments != 1) {
		fprintf(stderr, "stopcock simulate: a run is one experiment; "
		    "use --runs\n");
		return SC_EX_USAGE;
	}
	return -1;
bad:
	fprintf(stderr, "stopcock simulate: bad value '%s'\n", optarg);
	return SC_EX_USAGE;
}

/*
 * The scenario against the loaded configuration: its metrics, the
 * default horizon (the planned units of every arm), the cap on tests and
 * the default tick. -1 to go on, else the exit code.
 */
static int
sim_plan(struct sim *sim, struct scenario_opts *o, const char *confpath)
{
	const struct conf *conf = sim->conf;
	const struct conf_experiment *ce;
	double plan_units;
	char *cause = NULL;
	int default_horizon;

	if (conf->nguardrails == 0) {
		fprintf(stderr, "stopcock simulate: %s has no guardrails\n",
		    confpath);
		return SC_EX_USAGE;
	}
	default_horizon = sim->s.records == 0;
	if (default_horizon)
		sim->s.records = 2;	/* until the metrics are known */
	if (scenario_finish(&sim->s, conf, o, &cause) != 0) {
		fprintf(stderr, "stopcock simulate: %s\n", cause);
		free(cause);
		return SC_EX_USAGE;
	}
	if (default_horizon) {
		ce = conf_experiment_find(conf, sim->s.experiment);
		plan_units = ce && ce->plan_units > 0 ? ce->plan_units :
		    conf->plan_units;
		sim->s.records = (uint64_t)(plan_units * sim->s.narms) *
		    (uint64_t)scenario_records_per_unit(&sim->s) + 1;
	}
	if (conf->nguardrails * (sim->s.narms - 1) > SIM_TESTS_MAX) {
		fprintf(stderr, "stopcock simulate: at most %d guardrail x "
		    "arm tests\n", SIM_TESTS_MAX);
		return SC_EX_USAGE;
	}
	if (sim->tick_every == 0) {
		sim->tick_every = sim->s.rate > 0 ? (uint64_t)llround(
		    sim->s.rate * conf->tick) : 1000;
		if (sim->tick_every == 0)
			sim->tick_every = 1;
	}
	return -1;
}

/* Every run into a table shared with the workers, then the report. */
static int
sim_execute(struct sim *sim, double alpha_total)
{
	size_t mapsize;
	void *map;
	json_t *root;
	int rc;

	mapsize = sizeof(struct sim_run) * sim->runs + 64;
	map = mmap(NULL, mapsize, PROT_READ | PROT_WRITE,
	    MAP_SHARED | MAP_ANONYMOUS, -1, 0);
	if (map == MAP_FAILED) {
		fprintf(stderr, "stopcock simulate: mmap: %s\n",
		    strerror(errno));
		return SC_EX_OSERR;
	}
	sim->done = map;
	sim->res = (struct sim_run *)((char *)map + 64);
	if (sim_run_all(sim) != 0) {
		fprintf(stderr, "stopcock simulate: a worker failed\n");
		rc = SC_EX_SOFTWARE;
	} else {
		root = simreport_json(sim, alpha_total);
		if (sim->json) {
			json_dumpf(root, stdout, JSON_INDENT(2) |
			    JSON_REAL_PRECISION(8));
			fputc('\n', stdout);
		} else
			simreport_print(sim, root, stdout);
		json_decref(root);
		rc = fflush(stdout) == 0 ? SC_EX_OK : SC_EX_IOERR;
	}
	munmap(map, mapsize);
	return rc;
}

int
cmd_simulate(int argc, char **argv)
{
	const char *confpath = "/etc/stopcock/stopcock.conf";
	struct scenario_opts o;
	struct sim sim;
	struct conf *conf;
	char *cause = NULL;
	double alpha_total;
	int rc;

	sim_defaults(&sim, &o, argc, argv);
	if ((rc = sim_options(&sim, &o, argc, argv, &confpath)) != -1)
		return rc;
	if (conf_load(confpath, &conf, &cause) != 0) {
		fprintf(stderr, "%s\n", cause);
		free(cause);
		return SC_EX_CONFIG;
	}
	sim.conf = conf;
	if ((rc = sim_plan(&sim, &o, confpath)) != -1)
		goto out;
	sim.tty = isatty(STDERR_FILENO);
	sim_tests(&sim);
	if (!isfinite(alpha_total = sim_levels(&sim))) {
		fprintf(stderr, "stopcock simulate: the engine did not take "
		    "the plan (check max_variants and max_experiments)\n");
		rc = SC_EX_SOFTWARE;
		goto out;
	}
	sim_fixed(&sim);
	rc = sim_execute(&sim, alpha_total);
out:
	conf_free(conf);
	return rc;
}
