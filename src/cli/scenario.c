/*
 * scenario.c: the synthetic-traffic generator behind `stopcock generate`
 * and `stopcock simulate` (see scenario.h). It draws units from GSL's
 * Mersenne Twister, one seed per stream, so a (scenario, seed) pair
 * always yields the same records. Nothing here knows about tests or
 * verdicts: it only produces what clients would send.
 *
 * Models, per unit:
 *   lognormal  x = median exp(sigma Z)          (latencies)
 *   normal     x = mean + sd Z                  (means)
 *   binomial   N = 1 + Poisson(reqs - 1) requests, the unit's own error
 *              probability ~ Beta(p c, (1 - p) c), K ~ Binomial(N, p_u):
 *              errors clustered within users, as in real traffic
 *   poisson    N ~ Exponential(hours), K ~ Poisson(rate N): crashes in a
 *              session of random length (a Poisson process, no frailty)
 * An effect changes the effect arm's draws: relative on lognormal values
 * scales them (only above a baseline quantile when `above` is set, which
 * moves a tail and leaves the median alone); on normal values it shifts
 * by a fraction of the mean; on counts it scales the probability or rate.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>

#include "stopcock/stats.h"
#include "stopcock/util.h"
#include "scenario.h"

struct scenario_gen {
	struct scenario	 s;
	gsl_rng		*rng;
	uint64_t	 emitted, units;
	uint32_t	 next_plan;	/* plans still to emit this phase */
	int		 ramped;
	int		 phase;		/* 0: expose next; m+1: metric m */
	int		 arm;		/* this unit's arm */
	char		 exp[PROTO_NAME_MAX + 1];	/* this unit's experiment */
	double		 cum[2][PROTO_PLAN_MAX];	/* cumulative shares */
	double		 above[SCENARIO_METRICS_MAX];	/* effect thresholds */
};

uint64_t
scenario_mix(uint64_t x)
{
	x += 0x9e3779b97f4a7c15ULL;
	x = (x ^ (x >> 30)) * 0xbf58476d1ce4e5b9ULL;
	x = (x ^ (x >> 27)) * 0x94d049bb133111ebULL;
	return x ^ (x >> 31);
}

void
scenario_init(struct scenario *s)
{
	memset(s, 0, sizeof *s);
	snprintf(s->experiment, sizeof s->experiment, "exp");
	s->nexperiments = 1;
	s->narms = 2;
	snprintf(s->arms[0].name, sizeof s->arms[0].name, "control");
	snprintf(s->arms[1].name, sizeof s->arms[1].name, "treatment");
	s->arms[0].weight = s->arms[1].weight = 50;
	s->effect_arm = s->srm_arm = 1;
	s->rate = 1000;
	s->start = 1767225600;	/* 2026-01-01T00:00:00Z */
	s->records = 100000;
}

int
scenario_metric_find(const struct scenario *s, const char *name)
{
	int i;

	for (i = 0; i < s->nmetrics; i++)
		if (strcmp(s->metrics[i].name, name) == 0)
			return i;
	return -1;
}

static struct scenario_metric *
scenario_metric_add(struct scenario *s, const char *name,
    enum scenario_dist dist, double a, double b, double c)
{
	struct scenario_metric *m;
	int i;

	if ((i = scenario_metric_find(s, name)) >= 0)
		m = &s->metrics[i];
	else if (s->nmetrics < SCENARIO_METRICS_MAX) {
		m = &s->metrics[s->nmetrics++];
		memset(m, 0, sizeof *m);
		snprintf(m->name, sizeof m->name, "%s", name);
	} else
		return NULL;
	m->dist = dist;
	m->a = a;
	m->b = b;
	m->c = c;
	return m;
}

int
scenario_from_conf(struct scenario *s, const struct conf *conf)
{
	const struct conf_guardrail *g;
	int i;

	for (i = 0; i < conf->nguardrails; i++) {
		g = &conf->guardrails[i];
		if (scenario_metric_find(s, g->metric) >= 0)
			continue;
		switch (g->test) {
		case TEST_QUANTILE:
			scenario_metric_add(s, g->metric, SCEN_LOGNORMAL,
			    180, 0.5, 0);
			break;
		case TEST_MEAN:
			scenario_metric_add(s, g->metric, SCEN_NORMAL, 100,
			    20, 0);
			break;
		case TEST_PROPORTION:
			scenario_metric_add(s, g->metric, SCEN_BINOMIAL, 0.01,
			    8, 30);
			break;
		case TEST_RATE:
			scenario_metric_add(s, g->metric, SCEN_POISSON, 0.05,
			    0.5, 0);
			break;
		}
	}
	return s->nmetrics;
}

/*
 * The demo, an invented scenario: "Larder & Lane", a grocery and meal
 * delivery app, ramps a new checkout flow (checkout-v2) from 90/10 to
 * 50/50. The new flow adds a slow path that hits only the slowest 5% of
 * checkouts: their latency grows by 15%, so the p99 of latency_ms rises
 * by 15% while the median stays where it was. Errors, crashes, render
 * time and basket value are untouched. Metric names follow
 * conf/stopcock.conf.
 */
void
scenario_demo(struct scenario *s)
{
	struct scenario_metric *m;

	scenario_init(s);
	snprintf(s->experiment, sizeof s->experiment, "checkout-v2");
	s->arms[0].weight = 90;
	s->arms[1].weight = 10;
	s->ramp_at = 0.1;
	memcpy(s->ramp_arms, s->arms, sizeof s->ramp_arms);
	s->ramp_arms[0].weight = 50;
	s->ramp_arms[1].weight = 50;
	s->rate = 400;
	s->records = 700000;
	m = scenario_metric_add(s, "latency_ms", SCEN_LOGNORMAL, 240, 0.45, 0);
	m->effect = 0.15;
	m->effect_relative = 1;
	m->effect_above = 0.95;
	scenario_metric_add(s, "server_errors", SCEN_BINOMIAL, 0.004, 12, 40);
	scenario_metric_add(s, "crashes", SCEN_POISSON, 0.03, 0.4, 0);
	scenario_metric_add(s, "render_ms", SCEN_LOGNORMAL, 820, 0.3, 0);
	scenario_metric_add(s, "basket_gbp", SCEN_LOGNORMAL, 34, 0.45, 0);
}

void
scenario_preset(struct scenario *s, int argc, char **argv)
{
	int i;

	for (i = 1; i + 1 < argc; i++)
		if (strcmp(argv[i], "--scenario") == 0 &&
		    strcmp(argv[i + 1], "demo") == 0)
			scenario_demo(s);
}

/* ---- option parsing ---- */

int
scenario_parse_arms(const char *spec, struct proto_arm *arms, int *narms,
    char **cause)
{
	struct record r;
	char line[PROTO_LINE_MAX + 1];
	enum proto_status ps;
	int n;
	char *p;

	/* the plan record's own parser validates names and weights */
	n = snprintf(line, sizeof line, "plan x %s", spec);
	if (n < 0 || (size_t)n >= sizeof line) {
		xasprintf(cause, "arms '%.40s...': too long", spec);
		return -1;
	}
	for (p = line; *p != '\0'; p++)
		if (*p == ',')
			*p = ' ';
	ps = proto_parse(line, (size_t)n, &r);
	if (ps != PROTO_OK || r.kind != PROTO_PLAN) {
		xasprintf(cause, "arms '%s': %s (want control=50,treatment=50)",
		    spec, ps == PROTO_OK ? "not a plan" : proto_describe(ps));
		return -1;
	}
	if (r.narms < 2) {
		xasprintf(cause, "arms '%s': at least two arms", spec);
		return -1;
	}
	memcpy(arms, r.arms, (size_t)r.narms * sizeof *arms);
	*narms = r.narms;
	return 0;
}

int
scenario_parse_ramp(struct scenario *s, const char *spec, char **cause)
{
	const char *colon = strchr(spec, ':');
	char *frac;
	int n, rc;

	if (colon == NULL) {
		xasprintf(cause, "ramp '%s': want FRACTION:control=50,"
		    "treatment=50", spec);
		return -1;
	}
	frac = xstrndup(spec, (size_t)(colon - spec));
	rc = parse_double(frac, 1e-9, 1 - 1e-9, &s->ramp_at);
	free(frac);
	if (rc != 0) {
		xasprintf(cause, "ramp '%s': fraction must be in (0, 1)", spec);
		return -1;
	}
	if (scenario_parse_arms(colon + 1, s->ramp_arms, &n, cause) != 0)
		return -1;
	if (n != s->narms) {
		xasprintf(cause, "ramp '%s': give the same %d arms as the "
		    "plan, in the same order", spec, s->narms);
		return -1;
	}
	return 0;
}

/* Split "a:b:c" into at most max numbers; returns how many, -1 on error. */
static int
scenario_numbers(const char *spec, double *v, int max)
{
	char *copy = xstrdup(spec), *p = copy, *tok;
	int n = 0;

	while ((tok = strsep(&p, ":")) != NULL) {
		if (n == max || parse_double(tok, -1e300, 1e300, &v[n]) != 0) {
			free(copy);
			return -1;
		}
		n++;
	}
	free(copy);
	return n;
}

int
scenario_parse_baseline(struct scenario *s, const char *spec, char **cause)
{
	static const struct {
		const char		*name;
		enum scenario_dist	 dist;
		int			 min, max;
		const char		*form;
	} dists[] = {
		{ "lognormal", SCEN_LOGNORMAL, 2, 2, "lognormal:MEDIAN:SIGMA" },
		{ "normal", SCEN_NORMAL, 2, 2, "normal:MEAN:SD" },
		{ "binomial", SCEN_BINOMIAL, 2, 3,
		  "binomial:P:REQUESTS[:CONCENTRATION]" },
		{ "poisson", SCEN_POISSON, 2, 2, "poisson:RATE:HOURS" },
	};
	const char *eq = strchr(spec, '='), *colon;
	char name[PROTO_NAME_MAX + 1];
	double v[3] = { 0, 0, 0 };
	size_t i, len;
	int n;

	if (eq == NULL || (colon = strchr(eq, ':')) == NULL)
		goto bad;
	len = (size_t)(eq - spec);
	if (!proto_name_ok(spec, len))
		goto bad;
	memcpy(name, spec, len);
	name[len] = '\0';
	for (i = 0; i < SC_NELEM(dists); i++)
		if (strlen(dists[i].name) == (size_t)(colon - eq - 1) &&
		    strncmp(eq + 1, dists[i].name, (size_t)(colon - eq - 1)) == 0)
			break;
	if (i == SC_NELEM(dists))
		goto bad;
	n = scenario_numbers(colon + 1, v, 3);
	if (n < dists[i].min || n > dists[i].max) {
		xasprintf(cause, "baseline '%s': want %s=%s", spec, name,
		    dists[i].form);
		return -1;
	}
	switch (dists[i].dist) {
	case SCEN_LOGNORMAL:
		if (!(v[0] > 0) || !(v[1] >= 0))
			goto range;
		break;
	case SCEN_NORMAL:
		if (!(v[1] >= 0))
			goto range;
		break;
	case SCEN_BINOMIAL:
		if (!(v[0] >= 0 && v[0] <= 1) || !(v[1] >= 1 && v[1] <= 1e6) ||
		    !(v[2] >= 0))
			goto range;
		break;
	case SCEN_POISSON:
		if (!(v[0] >= 0) || !(v[1] > 0))
			goto range;
		break;
	}
	if (scenario_metric_add(s, name, dists[i].dist, v[0], v[1], v[2]) ==
	    NULL) {
		xasprintf(cause, "baseline '%s': more than %d metrics", spec,
		    SCENARIO_METRICS_MAX);
		return -1;
	}
	return 0;
range:
	xasprintf(cause, "baseline '%s': parameter out of range", spec);
	return -1;
bad:
	xasprintf(cause, "baseline '%s': want METRIC=lognormal:MEDIAN:SIGMA, "
	    "normal:MEAN:SD, binomial:P:REQUESTS[:CONCENTRATION] or "
	    "poisson:RATE:HOURS", spec);
	return -1;
}

int
scenario_parse_effect(struct scenario *s, const struct conf *conf,
    const char *spec, char **cause)
{
	char *copy = xstrdup(spec), *val, *opt, *pct;
	struct scenario_metric *m;
	double v, above = 0;
	int i, rel = 0;

	if ((val = strchr(copy, '=')) == NULL)
		goto bad;
	*val++ = '\0';
	if ((opt = strchr(val, ',')) != NULL) {
		*opt++ = '\0';
		if (strncmp(opt, "above=", 6) != 0 ||
		    parse_double(opt + 6, 0, 1 - 1e-9, &above) != 0)
			goto bad;
	}
	if ((pct = strchr(val, '%')) != NULL) {
		if (pct[1] != '\0')
			goto bad;
		*pct = '\0';
		rel = 1;
	}
	if (parse_double(val, -1e300, 1e300, &v) != 0)
		goto bad;
	if (rel)
		v /= 100;
	if ((i = scenario_metric_find(s, copy)) < 0 && conf != NULL) {
		for (i = 0; i < conf->nguardrails; i++)
			if (strcmp(conf->guardrails[i].name, copy) == 0)
				break;
		i = i < conf->nguardrails ? scenario_metric_find(s,
		    conf->guardrails[i].metric) : -1;
	}
	if (i < 0) {
		xasprintf(cause, "effect '%s': no metric or guardrail '%s'",
		    spec, copy);
		free(copy);
		return -1;
	}
	m = &s->metrics[i];
	if (above > 0 && m->dist != SCEN_LOGNORMAL && m->dist != SCEN_NORMAL) {
		xasprintf(cause, "effect '%s': above= is for observe metrics",
		    spec);
		free(copy);
		return -1;
	}
	if (rel && v <= -1) {
		xasprintf(cause, "effect '%s': a relative effect must be "
		    "above -100%%", spec);
		free(copy);
		return -1;
	}
	m->effect = v;
	m->effect_relative = rel;
	m->effect_above = above;
	free(copy);
	return 0;
bad:
	xasprintf(cause, "effect '%s': want METRIC=+15%% or METRIC=+20, "
	    "optionally followed by ,above=QUANTILE", spec);
	free(copy);
	return -1;
}

int
scenario_arm(const struct scenario *s, const char *name)
{
	int i;

	for (i = 0; i < s->narms; i++)
		if (strcmp(s->arms[i].name, name) == 0)
			return i;
	return -1;
}

int
scenario_check(const struct scenario *s, char **cause)
{
	int i;

	if (s->narms < 2 || s->narms > PROTO_PLAN_MAX) {
		xasprintf(cause, "a scenario needs 2 to %d arms",
		    PROTO_PLAN_MAX);
		return -1;
	}
	if (s->nexperiments < 1 || s->nexperiments > SCENARIO_EXPERIMENTS_MAX) {
		xasprintf(cause, "experiments must be 1 to %d",
		    SCENARIO_EXPERIMENTS_MAX);
		return -1;
	}
	if (strlen(s->experiment) + (s->nexperiments > 1 ? 7 : 0) >
	    PROTO_NAME_MAX || !proto_name_ok(s->experiment,
	    strlen(s->experiment))) {
		xasprintf(cause, "bad experiment name '%s'", s->experiment);
		return -1;
	}
	if (s->effect_arm < 1 || s->effect_arm >= s->narms ||
	    s->srm_arm < 0 || s->srm_arm >= s->narms) {
		xasprintf(cause, "the effect must be on a treatment arm");
		return -1;
	}
	if (!(s->srm_loss >= 0 && s->srm_loss < 1)) {
		xasprintf(cause, "srm loss must be in [0, 1)");
		return -1;
	}
	if (!(s->rate >= 0) || !isfinite(s->start)) {
		xasprintf(cause, "rate must be >= 0");
		return -1;
	}
	if (s->records < (uint64_t)s->nexperiments + 1) {
		xasprintf(cause, "%llu records cannot hold %u plans and data",
		    (unsigned long long)s->records, s->nexperiments);
		return -1;
	}
	if (s->ramp_at > 0)
		for (i = 0; i < s->narms; i++)
			if (strcmp(s->ramp_arms[i].name, s->arms[i].name) != 0) {
				xasprintf(cause, "the ramp must keep the arms "
				    "(%s)", s->arms[i].name);
				return -1;
			}
	return 0;
}

int
scenario_records_per_unit(const struct scenario *s)
{
	return 1 + s->nmetrics;
}

void
scenario_shares(const struct scenario *s, int epoch, double *share)
{
	const struct proto_arm *arms = epoch == 2 && s->ramp_at > 0 ?
	    s->ramp_arms : s->arms;
	double sum = 0;
	int i;

	for (i = 0; i < s->narms; i++) {
		share[i] = arms[i].weight;
		if (i == s->srm_arm)
			share[i] *= 1 - s->srm_loss;
		sum += share[i];
	}
	for (i = 0; i < s->narms; i++)
		share[i] /= sum;
}

/* ---- the generator ---- */

struct scenario_gen *
scenario_gen_new(const struct scenario *s, uint64_t seed)
{
	struct scenario_gen *g;
	const struct scenario_metric *m;
	double share[PROTO_PLAN_MAX], acc;
	int e, i;

	g = xcalloc(1, sizeof *g);
	g->s = *s;
	if ((g->rng = gsl_rng_alloc(gsl_rng_mt19937)) == NULL)
		fatal("gsl_rng_alloc failed");
	/* MT19937 takes a 32-bit seed; fold the mixed 64 bits into it */
	seed = scenario_mix(seed);
	gsl_rng_set(g->rng, (unsigned long)((seed ^ (seed >> 32)) &
	    0xffffffffUL));
	for (e = 0; e < 2; e++) {
		scenario_shares(s, e + 1, share);
		acc = 0;
		for (i = 0; i < s->narms; i++)
			g->cum[e][i] = acc += share[i];
		g->cum[e][s->narms - 1] = 1;
	}
	for (i = 0; i < s->nmetrics; i++) {
		m = &s->metrics[i];
		g->above[i] = -INFINITY;
		if (m->effect_above <= 0)
			continue;
		if (m->dist == SCEN_LOGNORMAL)
			g->above[i] = m->a * exp(m->b *
			    stats_norm_ppf(m->effect_above));
		else if (m->dist == SCEN_NORMAL)
			g->above[i] = m->a + m->b *
			    stats_norm_ppf(m->effect_above);
	}
	g->next_plan = s->nexperiments;
	return g;
}

void
scenario_gen_free(struct scenario_gen *g)
{
	if (g == NULL)
		return;
	gsl_rng_free(g->rng);
	free(g);
}

uint64_t
scenario_units(const struct scenario_gen *g)
{
	return g->units;
}

uint64_t
scenario_emitted(const struct scenario_gen *g)
{
	return g->emitted;
}

/* Values go out with 4 decimals, as a client would report them; short
 * numbers also keep the text form compact and quick to write. */
static double
scenario_round(double x)
{
	return fabs(x) < 1e11 ? nearbyint(x * 1e4) / 1e4 : x;
}

void
scenario_draw(struct scenario_gen *g, int mi, int treated, double *x,
    double *k, double *n)
{
	const struct scenario_metric *m = &g->s.metrics[mi];
	gsl_rng *r = g->rng;
	double v, p, pu, lambda;
	int eff = treated && m->effect != 0;

	switch (m->dist) {
	case SCEN_LOGNORMAL:
		v = m->a * exp(m->b * gsl_ran_gaussian_ziggurat(r, 1));
		if (eff && v > g->above[mi])
			v = m->effect_relative ? v * (1 + m->effect) :
			    v + m->effect;
		*x = scenario_round(v);
		break;
	case SCEN_NORMAL:
		v = m->a + m->b * gsl_ran_gaussian_ziggurat(r, 1);
		if (eff && v > g->above[mi])
			v += m->effect_relative ? m->effect * fabs(m->a) :
			    m->effect;
		*x = scenario_round(v);
		break;
	case SCEN_BINOMIAL:
		p = m->a;
		if (eff)
			p = m->effect_relative ? p * (1 + m->effect) :
			    p + m->effect;
		p = fmin(fmax(p, 0), 1);
		*n = 1 + (m->b > 1 ? gsl_ran_poisson(r, m->b - 1) : 0);
		pu = p;
		if (m->c > 0 && p > 0 && p < 1)
			pu = gsl_ran_beta(r, p * m->c, (1 - p) * m->c);
		*k = gsl_ran_binomial(r, pu, (unsigned)*n);
		break;
	case SCEN_POISSON:
		lambda = m->a;
		if (eff)
			lambda = m->effect_relative ? lambda *
			    (1 + m->effect) : lambda + m->effect;
		lambda = fmax(lambda, 0);
		*n = fmax(scenario_round(gsl_ran_exponential(r, m->b)), 1e-4);
		*k = gsl_ran_poisson(r, lambda * *n);
		break;
	}
}

static void
scenario_exp_name(struct scenario_gen *g, uint32_t i)
{
	char buf[PROTO_NAME_MAX + 16];

	/* scenario_check keeps the prefix short enough for the suffix */
	if (g->s.nexperiments == 1)
		snprintf(buf, sizeof buf, "%s", g->s.experiment);
	else
		snprintf(buf, sizeof buf, "%.*s-%06u", PROTO_NAME_MAX - 7,
		    g->s.experiment, i + 1);
	memcpy(g->exp, buf, sizeof g->exp - 1);
	g->exp[sizeof g->exp - 1] = '\0';
}

static int
scenario_pick_arm(struct scenario_gen *g)
{
	const double *cum = g->cum[g->ramped ? 1 : 0];
	double u = gsl_rng_uniform(g->rng);
	int i;

	for (i = 0; i < g->s.narms - 1; i++)
		if (u < cum[i])
			return i;
	return g->s.narms - 1;
}

int
scenario_next(struct scenario_gen *g, struct record *r)
{
	const struct scenario *s = &g->s;
	const struct scenario_metric *m;
	uint32_t i;
	int treated;

	if (g->emitted >= s->records)
		return 0;
	/* the generator states neither unit nor epoch: each record is its
	 * own unit and counts in the epoch current when it arrives; its
	 * plans name no family (every configured guardrail applies) */
	r->epoch = 0;
	r->unit_len = 0;
	r->unit[0] = '\0';
	r->family_len = 0;
	r->family[0] = '\0';
	r->untrusted = 0;	/* replay and simulate trust their input */
	if (g->phase == 0 && g->next_plan == 0 && !g->ramped &&
	    s->ramp_at > 0 && (double)g->emitted >= s->ramp_at *
	    (double)s->records) {
		g->ramped = 1;
		g->next_plan = s->nexperiments;
	}
	r->has_ts = s->rate > 0;
	r->ts = r->has_ts ? nearbyint((s->start + (double)g->emitted /
	    s->rate) * 1e3) / 1e3 : 0;
	g->emitted++;
	if (g->next_plan > 0) {
		i = s->nexperiments - g->next_plan--;
		scenario_exp_name(g, i);
		r->kind = PROTO_PLAN;
		memcpy(r->experiment, g->exp, sizeof r->experiment);
		r->narms = s->narms;
		memcpy(r->arms, g->ramped ? s->ramp_arms : s->arms,
		    (size_t)s->narms * sizeof *r->arms);
		return 1;
	}
	if (g->phase == 0) {
		if (s->nexperiments > 1)
			scenario_exp_name(g, (uint32_t)gsl_rng_uniform_int(
			    g->rng, s->nexperiments));
		else if (g->exp[0] == '\0')
			scenario_exp_name(g, 0);
		g->arm = scenario_pick_arm(g);
		g->units++;
		r->kind = PROTO_EXPOSE;
		r->units = 1;
	} else {
		m = &s->metrics[g->phase - 1];
		treated = g->arm == s->effect_arm;
		memcpy(r->metric, m->name, sizeof r->metric);
		if (m->dist == SCEN_LOGNORMAL || m->dist == SCEN_NORMAL) {
			r->kind = PROTO_OBSERVE;
			scenario_draw(g, g->phase - 1, treated, &r->value,
			    NULL, NULL);
		} else {
			r->kind = PROTO_COUNT;
			scenario_draw(g, g->phase - 1, treated, NULL, &r->k,
			    &r->n);
		}
	}
	memcpy(r->experiment, g->exp, sizeof r->experiment);
	memcpy(r->variant, s->arms[g->arm].name, sizeof r->variant);
	g->phase = g->phase == s->nmetrics ? 0 : g->phase + 1;
	return 1;
}

/* ---- putting options together ---- */

int
scenario_opts_add(const char **list, int *n, const char *spec, char **cause)
{
	if (*n >= SCENARIO_SPECS_MAX) {
		xasprintf(cause, "at most %d of '%s'", SCENARIO_SPECS_MAX,
		    spec);
		return -1;
	}
	list[(*n)++] = spec;
	return 0;
}

int
scenario_finish(struct scenario *s, const struct conf *conf,
    const struct scenario_opts *o, char **cause)
{
	int i;

	if (o->ramp != NULL && scenario_parse_ramp(s, o->ramp, cause) != 0)
		return -1;
	for (i = 0; i < o->nbaseline; i++)
		if (scenario_parse_baseline(s, o->baseline[i], cause) != 0)
			return -1;
	if (conf != NULL)
		scenario_from_conf(s, conf);
	if (s->nmetrics == 0) {
		/* one metric of each kind, named as in conf/stopcock.conf */
		scenario_metric_add(s, "latency_ms", SCEN_LOGNORMAL, 180, 0.5,
		    0);
		scenario_metric_add(s, "server_errors", SCEN_BINOMIAL, 0.01, 8,
		    30);
		scenario_metric_add(s, "crashes", SCEN_POISSON, 0.05, 0.5, 0);
		scenario_metric_add(s, "render_ms", SCEN_NORMAL, 850, 120, 0);
	}
	for (i = 0; i < o->neffect; i++)
		if (scenario_parse_effect(s, conf, o->effect[i], cause) != 0)
			return -1;
	if (o->effect_arm == NULL)
		s->effect_arm = s->srm_arm = s->narms - 1;
	else {
		if ((i = scenario_arm(s, o->effect_arm)) < 1) {
			xasprintf(cause, "effect arm '%s' is not a treatment "
			    "arm of the plan", o->effect_arm);
			return -1;
		}
		s->effect_arm = s->srm_arm = i;
	}
	return scenario_check(s, cause);
}

const char scenario_help[] =
"  --scenario NAME      start from a preset: demo (Larder & Lane ramps\n"
"                       checkout-v2 90/10 -> 50/50; the slowest 5% of\n"
"                       checkouts get 15% slower, so p99 latency grows\n"
"                       15%) or plain (the default)\n"
"  --records N          records in the stream (plans included)\n"
"  --experiments N      experiments sharing the traffic (ids ID-000001..)\n"
"  --experiment ID      experiment id, or the prefix of the ids\n"
"  --arms A=W,B=W..     arms and planned weights (control first)\n"
"  --ramp F:A=W,B=W..   after fraction F of the records, new weights\n"
"  --baseline M=DIST    lognormal:MEDIAN:SIGMA, normal:MEAN:SD,\n"
"                       binomial:P:REQUESTS[:CONCENTRATION] (errors per\n"
"                       request, clustered by unit), poisson:RATE:HOURS\n"
"                       (events per hour over random session hours)\n"
"  --effect M=+15%[,above=Q]  effect on the effect arm: relative (%) or\n"
"                       absolute; above=Q changes only values above the\n"
"                       baseline's Q quantile (a tail); M may name a\n"
"                       guardrail\n"
"  --effect-arm V       the arm with the effect and the SRM (default last)\n"
"  --srm-loss F         share of the effect arm's units lost before\n"
"                       exposure is logged (a sample ratio mismatch)\n"
"  --rate R             records per second of record time (0: no times)\n"
"  --start TS           unix time of the first record\n";

int
scenario_option(struct scenario *s, struct scenario_opts *o, int code,
    const char *arg, char **cause)
{
	uint64_t u;

	switch (code) {
	case SOPT_EXPERIMENTS:
		if (parse_u64(arg, SCENARIO_EXPERIMENTS_MAX, &u) != 0 ||
		    u == 0)
			goto bad;
		s->nexperiments = (uint32_t)u;
		return 0;
	case SOPT_EXPERIMENT:
		if (!proto_name_ok(arg, strlen(arg)))
			goto bad;
		snprintf(s->experiment, sizeof s->experiment, "%s", arg);
		return 0;
	case SOPT_ARMS:
		return scenario_parse_arms(arg, s->arms, &s->narms, cause);
	case SOPT_RAMP:
		o->ramp = arg;
		return 0;
	case SOPT_BASELINE:
		return scenario_opts_add(o->baseline, &o->nbaseline, arg,
		    cause);
	case SOPT_EFFECT:
		return scenario_opts_add(o->effect, &o->neffect, arg, cause);
	case SOPT_EFFECT_ARM:
		o->effect_arm = arg;
		return 0;
	case SOPT_SRM_LOSS:
		if (parse_double(arg, 0, 0.99, &s->srm_loss) != 0)
			goto bad;
		return 0;
	case SOPT_RATE:
		if (parse_double(arg, 0, 1e12, &s->rate) != 0)
			goto bad;
		return 0;
	case SOPT_START:
		if (parse_double(arg, 0, 1e11, &s->start) != 0)
			goto bad;
		return 0;
	case SOPT_SCENARIO:
		/* applied by scenario_preset */
		if (strcmp(arg, "demo") != 0 && strcmp(arg, "plain") != 0) {
			xasprintf(cause, "no scenario '%s' (demo or plain)",
			    arg);
			return -1;
		}
		return 0;
	case SOPT_RECORDS:
		if (parse_u64(arg, UINT64_C(1) << 50, &u) != 0 || u == 0)
			goto bad;
		s->records = u;
		return 0;
	}
bad:
	xasprintf(cause, "bad value '%s'", arg);
	return -1;
}
