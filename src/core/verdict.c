/*
 * verdict.c: guardrail policy x tallies -> evidence -> verdicts. For one
 * test (a guardrail on one treatment arm against the control) this turns
 * the two arms' tallies into an estimate, an always-valid p-value and a
 * confidence sequence by calling the statistics module, then applies the
 * one rule shared by every test kind:
 *
 *   harm  when the always-valid p-value of the one-sided test "the effect
 *         lies beyond the margin in the harmful direction" is at most the
 *         test's level (alpha / family, Bonferroni), or when the change
 *         detector (change.c) crosses its threshold;
 *   safe  when the confidence sequence lies entirely on the good side of
 *         the margin (harm beyond the margin is ruled out so far);
 *   otherwise undecided.
 *
 * The evidence only ever points at harm, so a treatment better than the
 * control lowers it; across epochs the p-value multiplies per-epoch test
 * martingales (closed_log_e), never pooling tallies across weights. Harm
 * is kept for the epoch; safe may turn into harm (it speaks of the data
 * so far). Tests only read numbers; the engine decides when to call them
 * (cheap kinds on every record, quantiles and rate CSs on the tick).
 * The quantile tests' looks (the sketches' views, tails, bounds) are in
 * verdict_quantile.c.
 */
#include <math.h>
#include <string.h>

#include "stopcock/util.h"
#include "verdict_int.h"

double
verdict_level(const struct experiment *e)
{
	return e->alpha / (e->family > 0 ? e->family : 1);
}

double
verdict_pause_level(const struct engine *eng, const struct experiment *e)
{
	double pa = eng->conf->pause_alpha > 0 ? eng->conf->pause_alpha :
	    e->alpha / 10;

	return pa / (e->family > 0 ? e->family : 1);
}

/* Planned units per arm that tune this guardrail's mixture: its own
 * plan_units when set, else the experiment's. */
double
plan_units_of(const struct conf_guardrail *g, const struct experiment *e)
{
	return g->plan_units > 0 ? g->plan_units : e->plan_units;
}

/* Signed direction: +1 when an increase is harmful. */
static double
harm_sign(const struct conf_guardrail *g)
{
	return g->harm == HARM_INCREASE ? 1.0 : -1.0;
}

double
verdict_margin_abs(const struct conf_guardrail *g, double control)
{
	if (!g->margin_relative)
		return g->margin;
	return isfinite(control) ? g->margin * fabs(control) : 0;
}

void
verdict_cs_intersect(struct test *t, double lo, double hi)
{
	/*
	 * Running intersection (docs/methods.md sec. 0). With plug-in variances
	 * the intersection can come out empty, a sign of model misfit; we
	 * then restart from the current interval rather than report an
	 * empty set.
	 */
	double nlo = fmax(t->cs_lo, lo), nhi = fmin(t->cs_hi, hi);

	if (nlo > nhi) {
		nlo = lo;
		nhi = hi;
	}
	t->cs_lo = nlo;
	t->cs_hi = nhi;
}

void
verdict_set_relative(struct test *t)
{
	double c = t->ctl_value;

	if (isfinite(c) && c != 0) {
		t->rel = t->est / fabs(c);
		t->rel_lo = t->cs_lo / fabs(c);
		t->rel_hi = t->cs_hi / fabs(c);
	} else
		t->rel = t->rel_lo = t->rel_hi = NAN;
}

/*
 * The design's one-sided tail at the harm boundary, q = 1 - Phi(d* /
 * sqrt V) with tau^2 tuned for V: it fixes the kappa inflation of a
 * group variance (stats_group_kappa). Depends on the level only.
 */
static double
design_tail(double level)
{
	double c = stats_msprt_tau2(1, 2 * level, 1);

	return stats_norm_sf(stats_harm_boundary(1, c, level));
}

/*
 * Variance of one arm's ratio (mean, proportion, rate) from its unit
 * groups, inflated by kappa for the few groups it rests on; NAN when the
 * series has no groups or too few filled ones (ENGINE_GROUPS_MIN).
 */
static double
group_var(const struct engine *eng, const struct series *sr, double q)
{
	const struct groups *gp = sr->grp;
	double R, v, kappa;

	if (gp == NULL || gp->used < ENGINE_GROUPS_MIN)
		return NAN;
	v = stats_group_var_strided((int)gp->G, gp->sn, gp->sn + 1, 2, &R);
	kappa = stats_group_kappa(gp->used - 1, q);
	return isfinite(kappa) && kappa > 1 ? v * kappa : v;
}

/*
 * The group variance of an arm whose record-level variance is var, at
 * recs records: computed afresh when the series grew by a 1/64th (and 16
 * records) since the last time, else the design effect of then times today's var (the
 * hot path of means and proportions looks after every record).
 */
static double
group_var_cached(const struct engine *eng, const struct series *sr,
    double q, double recs, double var)
{
	struct groups *gp = sr->grp;
	double gv;

	if (gp == NULL)
		return NAN;
	if (gp->deff_at > 0 && recs < gp->deff_at + fmax(ENGINE_DEFF_STEP,
	    gp->deff_at / ENGINE_DEFF_REFRESH))
		return var > 0 && gp->deff > 0 ? gp->deff * var : gp->gv;
	gv = group_var(eng, sr, q);
	if (!isfinite(gv))
		return gv;	/* too few groups: look again next record */
	gp->deff_at = recs;
	gp->gv = gv;
	gp->deff = var > 0 ? gv / var : 0;
	return gv;
}

/*
 * Per-arm estimates and variances of a mean, proportion or rate ratio.
 * var is the variance of the arm's estimate; without unit groups it is
 * the record-level one (each record its own unit), with groups the
 * larger of that and the group variance, so clustering can only widen.
 */
struct arm_est {
	double	value, var, n, k;	/* estimate, its variance, N, K */
	double	recs;			/* records */
	double	deff;			/* group / record-level variance */
};

static int
arm_estimate(const struct engine *eng, const struct conf_guardrail *g,
    const struct series *sr, double q, struct arm_est *out)
{
	double gv;

	if (g->test == TEST_MEAN) {
		if (sr->m.n < ENGINE_BURN_IN)
			return -1;
		out->n = out->recs = (double)sr->m.n;
		out->value = sr->m.mean;
		out->var = tally_moments_var(&sr->m) / out->n;
	} else {
		if (sr->r.records < ENGINE_BURN_IN)
			return -1;
		out->n = (double)sr->r.n;
		out->recs = (double)sr->r.records;
		out->k = (double)sr->r.k;
		out->value = tally_ratio_rate(&sr->r);
		/* delta method over records: a record (a session's K of N)
		 * is a cluster of its own */
		out->var = tally_ratio_var(&sr->r);
	}
	if (!isfinite(out->value))
		return -1;
	out->deff = 1;
	gv = group_var_cached(eng, sr, q, out->recs, out->var);
	if (isfinite(gv) && out->var > 0) {
		out->deff = gv / out->var;
		if (gv > out->var)
			out->var = gv;
	} else if (isfinite(gv) && gv > 0)
		out->var = gv;
	return 0;
}

/* An arm's variance over the binomial one of independent trials; 1 when
 * the arm has no event (or only events) yet and no estimate of it. */
static double
binomial_deff(const struct arm_est *x)
{
	double p = x->value, vb = p * (1 - p) / x->n;

	return vb > 0 && x->var > 0 ? x->var / vb : 1;
}

/*
 * Mean, proportion and (beside the exact conditional test) rate: the
 * one-sided harm mixture with a margin (stats_harm_log_e). For a relative
 * margin r the contrast stays linear: theta = mu_T - (1 + s r) mu_C, so
 * H0 is s theta <= 0 and V = V_T + (1 + s r)^2 V_C. tau^2 follows the
 * one-sided tuning rule at the planned units per arm, in units of the
 * pooled per-unit variance, so it is fixed in standardised terms.
 *
 * Proportions take their variance under the null (Farrington & Manning
 * 1990): the proportions that maximise the likelihood subject to the
 * margin, so an arm with no event yet still has p~(1 - p~)/n. Clustering
 * multiplies it by the arm's design effect (at least 1). They are looked
 * at only once both arms expect 5 events and 5 non-events under the
 * pooled rate: the normal tail is too light before that (common practice
 * for binomial z-tests; our choice of 5).
 */
static int
eval_normal(const struct engine *eng, struct experiment *e, struct test *t,
    const struct conf_guardrail *g, const struct series *a,
    const struct series *b, double level)
{
	struct arm_est ca, tb;
	double s = harm_sign(g), k, d, V, tau2, hw, vu, q, vt, vc;

	if (t->tau2_level != level) {
		t->tau2_level = level;
		t->tau2_unit = stats_msprt_tau2(1, 2 * level, plan_units_of(g, e));
		t->tail_q = design_tail(level);
	}
	q = t->tail_q;
	if (arm_estimate(eng, g, a, q, &ca) != 0 ||
	    arm_estimate(eng, g, b, q, &tb) != 0)
		return -1;
	t->ctl_value = ca.value;
	t->trt_value = tb.value;
	t->est = tb.value - ca.value;
	t->margin_abs = verdict_margin_abs(g, ca.value);
	k = g->margin_relative ? 1 + s * g->margin : 1;
	d = s * (tb.value - k * ca.value) -
	    (g->margin_relative ? 0 : g->margin);
	if (g->test == TEST_PROPORTION) {
		double pt, pc, pool, D;

		pool = (ca.k + tb.k) / (ca.n + tb.n);
		if (fmin(ca.n, tb.n) * fmin(pool, 1 - pool) < ENGINE_EVENTS_MIN)
			return -1;
		D = s * (g->margin_relative ? g->margin * ca.value : g->margin);
		if (fabs(D) >= 1 ||
		    stats_prop_null(tb.k, tb.n, ca.k, ca.n, D, &pt, &pc) != 0)
			return -1;
		/* design effects against independent trials: records of
		 * K of N and units of many records both widen */
		tb.deff = binomial_deff(&tb);
		ca.deff = binomial_deff(&ca);
		vt = fmax(1, tb.deff) * pt * (1 - pt) / tb.n;
		vc = fmax(1, ca.deff) * pc * (1 - pc) / ca.n;
	} else {
		vt = tb.var;
		vc = ca.var;
		if (g->test == TEST_MEAN) {
			/*
			 * A small arm of skewed data (latencies) mostly misses
			 * the rare large values: its mean and its variance
			 * are low together, and a plug-in z reads that as an
			 * effect. Under the null of no difference the pooled
			 * within-arm variance is consistent and carries the
			 * large arm's tail, so neither arm's per-record
			 * variance goes below it (times the arm's design
			 * effect): conservative when the arms differ.
			 */
			double pool = (a->m.m2 + b->m.m2) / (ca.recs + tb.recs -
			    2);
			if (pool * fmax(1, tb.deff) / tb.recs > vt)
				vt = pool * fmax(1, tb.deff) / tb.recs;
			if (pool * fmax(1, ca.deff) / ca.recs > vc)
				vc = pool * fmax(1, ca.deff) / ca.recs;
		}
	}
	V = vt + k * k * vc;
	t->sig2_t = vt * (g->test == TEST_PROPORTION ? tb.n : tb.recs);
	t->sig2_c = vc * (g->test == TEST_PROPORTION ? ca.n : ca.recs);
	t->kfac = k;
	t->mlin = g->margin_relative ? 0 : g->margin;
	/* per-record variance: plan_units counts units (records without
	 * unit=), whatever a record's N is (trials, hours) */
	vu = vt * tb.recs + vc * ca.recs;
	if (!(V > 0) || !isfinite(V) || !(vu > 0))
		return -1;
	t->deff = fmax(ca.deff, tb.deff);
	tau2 = vu * t->tau2_unit;
	t->log_e = stats_harm_log_e(d, V, tau2);
	t->V = V;
	t->tau2 = tau2;
	/* display and safe: a two-sided CS of T - C on the same scale
	 * (for proportions the null variance, which cannot collapse) */
	hw = stats_msprt_halfwidth(g->test == TEST_PROPORTION ? V :
	    tb.var + ca.var, tau2, level);
	t->lo = t->est - hw;
	t->hi = t->est + hw;
	verdict_cs_intersect(t, t->lo, t->hi);
	return 0;
}

/*
 * Rate: events over exposure. Given the total, each event's arm is a
 * categorical draw with the exposure share as null probability; the
 * beta-mixture Bayes factor is exact at any count (Lindon & Malek 2022;
 * docs/methods.md sec. 5). The null is the margin's rate ratio r0; the
 * one-sided factor (prior truncated to the harmful side) is a test
 * supermartingale for every ratio on the good side of r0.
 */
/* Events per arm after which the rate's ratio test decides alone (our
 * choice; validity measured by tests/ref/test_adversary.py, cells 11a,
 * 11b, x8, x10, x11). */
#define VERDICT_RATE_ROBUST_EVENTS 50

static int
eval_rate(const struct engine *eng, struct experiment *e, struct test *t,
    const struct conf_guardrail *g, const struct series *a,
    const struct series *b, double level, double k, int want_cs)
{
	double ka = (double)a->r.k, ea = (double)a->r.n;
	double kb = (double)b->r.k, eb = (double)b->r.n;
	double ra, rb, share, r0, th0, rlo, rhi, saved_lo, saved_hi;
	double robust = NAN;

	if (!(ea > 0) || !(eb > 0) || ka + kb < 1)
		return -1;
	ra = ka / ea;
	rb = kb / eb;
	t->ctl_value = ra;
	t->trt_value = rb;
	t->est = rb - ra;
	t->margin_abs = verdict_margin_abs(g, ra);
	/* the margin as a rate ratio */
	if (g->margin_relative)
		r0 = 1 + harm_sign(g) * g->margin;
	else
		r0 = ra > 0 ? 1 + harm_sign(g) * g->margin / ra : 1;
	if (!(r0 > 0))
		r0 = 1e-9;
	share = eb / (ea + eb);
	th0 = share * r0 / (share * r0 + (1 - share));
	/*
	 * The conditional test is exact only for Poisson events; a crash
	 * loop makes one unit's events share a label. The ratio test with a
	 * record- or unit-level variance holds whatever the dependence within
	 * units, but only asymptotically. While counts are small harm needs
	 * both: the smaller of two e-processes is below each, so it keeps the
	 * guarantee of whichever one's assumptions hold. Once both arms have
	 * VERDICT_RATE_ROBUST_EVENTS events the ratio test's normal limit is
	 * what we rely on and it decides alone: the evidence is then never
	 * above the ratio test's, so the pair is as valid as that test, and
	 * the minimum's cost in power (measured: 1.11 -> 0.90 of the
	 * fixed-horizon size) goes.
	 */
	saved_lo = t->cs_lo;
	saved_hi = t->cs_hi;
	if (eval_normal(eng, e, t, g, a, b, level) == 0)
		robust = t->log_e;
	t->cs_lo = saved_lo;
	t->cs_hi = saved_hi;
	if (g->harm == HARM_INCREASE)
		t->log_e = stats_rate_log_bf(ka, kb, th0, k, 1);
	else
		t->log_e = stats_rate_log_bf(kb, ka, 1 - th0, k, 1);
	if (!isfinite(robust))
		return -1;
	if (robust < t->log_e || fmin(ka, kb) >= VERDICT_RATE_ROBUST_EVENTS)
		t->log_e = robust;
	t->ctl_value = ra;
	t->trt_value = rb;
	t->est = rb - ra;
	t->margin_abs = verdict_margin_abs(g, ra);
	/*
	 * Bounds from inverting the one-sided factors, each side at half the
	 * level so the pair is a two-sided confidence sequence at the level.
	 * At a harm verdict rate_harm_bound tightens the harmful side to the
	 * verdict's own (one-sided, full-level) bound.
	 */
	if (want_cs &&
	    stats_rate_ratio_bound(ka, ea, kb, eb, k, level / 2, 0,
	    &rlo) == 0 &&
	    stats_rate_ratio_bound(ka, ea, kb, eb, k, level / 2, 1,
	    &rhi) == 0) {
		/* reported on the rate-difference scale at the current
		 * control rate; the ratio itself is rel + 1 */
		t->lo = (rlo - 1) * ra;
		t->hi = isfinite(rhi) ? (rhi - 1) * ra : INFINITY;
		verdict_cs_intersect(t, t->lo, t->hi);
	}
	return 0;
}


/*
 * The costly kinds (quantile, rate) are evaluated on the tick, and only
 * once their data grew since the last look: the evidence when the sample
 * count grew by 2% (at least 32 samples), the confidence sequences, which
 * are bisections over many incomplete betas and serve the charts, the
 * reported bounds and the safe verdict, when it grew by 25% (at least 64)
 * and at every verdict. Looking on a subsequence keeps Ville's bound and
 * the running intersection valid; what it costs is a verdict up to 2%
 * (harm) or 25% (safe) of the samples late, in exchange for a tick whose
 * cost does not grow with the tick rate. engine_finish looks at
 * everything.
 */
#define VERDICT_CHEAP_GROWTH 1.001
#define VERDICT_EV_GROWTH 1.02
#define VERDICT_EV_MIN_STEP 32
#define VERDICT_CS_GROWTH 1.25
#define VERDICT_CS_MIN_STEP 64

int
verdict_grown(const struct engine *eng, double *last, double n, double growth,
    double step)
{
	if (n <= *last || (!eng->force && n < *last * growth &&
	    n < *last + step))
		return 0;
	*last = n;
	return 1;
}

/*
 * At a mean or proportion harm verdict: the harmful side's bound from
 * inverting the same one-sided test at the same level, sign * effect
 * >= sign * estimate - d*, so the alert's bound lies beyond the margin
 * exactly when the verdict does (the two-sided display CS is wider).
 */
static void
normal_harm_bound(struct test *t, const struct conf_guardrail *g,
    double level)
{
	double dstar = stats_harm_boundary(t->V, t->tau2, level);

	if (!isfinite(dstar) || !isfinite(t->est))
		return;
	if (g->harm == HARM_INCREASE && t->est - dstar > t->cs_lo)
		t->cs_lo = t->est - dstar;
	else if (g->harm == HARM_DECREASE && t->est + dstar < t->cs_hi)
		t->cs_hi = t->est + dstar;
}

/*
 * At a rate harm verdict: the bound on the harmful side from the same
 * one-sided test at the same level, so the alert's bound lies beyond the
 * margin exactly when the verdict does.
 */
static void
rate_harm_bound(struct test *t, const struct conf_guardrail *g,
    const struct series *a, const struct series *b, double level, double k)
{
	double ka = (double)a->r.k, ea = (double)a->r.n;
	double kb = (double)b->r.k, eb = (double)b->r.n, r, ra;

	if (!(ea > 0) || !(eb > 0) || !(ka > 0))
		return;
	ra = ka / ea;
	if (stats_rate_ratio_bound(ka, ea, kb, eb, k, level,
	    g->harm == HARM_DECREASE, &r) != 0 || !isfinite(r))
		return;
	if (g->harm == HARM_INCREASE && (r - 1) * ra > t->cs_lo)
		t->cs_lo = (r - 1) * ra;
	else if (g->harm == HARM_DECREASE && (r - 1) * ra < t->cs_hi)
		t->cs_hi = (r - 1) * ra;
}

static double
rate_concentration(const struct engine *eng)
{
	/* docs/methods.md sec. 3: k = 100 as a default concentration for the
	 * categorical rate test; configurable. */
	return eng->conf->rate_concentration > 0 ?
	    eng->conf->rate_concentration : 100;
}

/*
 * The verdict rule, one place for every kind: harm when the running
 * test's always-valid p is at or below the level or the change detector
 * alarmed (det); safe when the confidence sequence excludes harm beyond
 * the margin. Every change is emitted with the verdict it replaces.
 * want_cs: the bounds of this look are fresh.
 */
static void
verdict_set(struct engine *eng, struct experiment *e, struct test *t,
    const struct conf_guardrail *g, const struct series *a,
    const struct series *b, int want_cs, int det)
{
	struct finding f;
	double level = verdict_level(e), s = harm_sign(g), p, pl;
	enum verdict old = t->verdict, nv = old;

	p = stats_p_from_log_e(t->max_log_e);
	/*
	 * The evidence is one-sided: it points at harm beyond the margin
	 * only, so no sign check of the latest estimate. Harm may follow
	 * safe: safe said harm was ruled out on the data until then, and
	 * both the running test and the change detector keep watching.
	 */
	if (old != VERDICT_HARM && (p <= level || det)) {
		nv = VERDICT_HARM;
		t->by_detector = p > level;
	} else if (old == VERDICT_UNDECIDED && isfinite(t->cs_lo) &&
	    isfinite(t->cs_hi) &&
	    s * (s * t->margin_abs - (s > 0 ? t->cs_hi : t->cs_lo)) > 0)
		nv = VERDICT_SAFE;
	if (nv != old) {
		/* an alert carries fresh bounds, whatever the schedule */
		if (!want_cs && g->test == TEST_QUANTILE)
			(void)verdict_quantile_eval(eng, e, t, g, a, b, level, 1);
		else if (!want_cs && g->test == TEST_RATE)
			(void)eval_rate(eng, e, t, g, a, b, level,
			    rate_concentration(eng), 1);
		if (nv == VERDICT_HARM && g->test == TEST_QUANTILE)
			verdict_quantile_harm_bound(eng, e, t, g, a, b, level);
		if (nv == VERDICT_HARM && g->test == TEST_RATE)
			rate_harm_bound(t, g, a, b, level,
			    rate_concentration(eng));
		if (nv == VERDICT_HARM && (g->test == TEST_MEAN ||
		    g->test == TEST_PROPORTION))
			normal_harm_bound(t, g, level);
		verdict_set_relative(t);
		t->verdict = nv;
		t->first_ts = eng->now;
		t->first_event = eng->event;
		finding_fill(eng, e, t, FINDING_VERDICT, &f);
		f.previous = old;
		engine_emit(eng, &f);
	}
	/* a detector's harm pauses once its evidence is as many times
	 * stronger than its threshold as pause_alpha is below the level */
	pl = verdict_pause_level(eng, e);
	if (t->verdict == VERDICT_HARM && g->action == ACTION_PAUSE &&
	    !t->pause_sent && (p <= pl || (t->by_detector &&
	    t->det_log_m >= change_threshold(eng, e) + log(level / pl)))) {
		t->pause_sent = 1;
		finding_fill(eng, e, t, FINDING_PAUSE, &f);
		engine_emit(eng, &f);
	}
}

/* The control's and this treatment's series of a test; -1 without. */
static int
test_series(const struct experiment *e, const struct test *t,
    const struct series **a, const struct series **b)
{
	const struct metric *m;

	if (t->metric < 0 || t->arm <= 0)
		return -1;
	m = &e->metrics[t->metric];
	if (m->arm == NULL)
		return -1;
	*a = &m->arm[0];
	*b = &m->arm[t->arm];
	return 0;
}

/*
 * Evidence from a closing epoch's test (late records naming it, engine.c
 * closing_*) joins its experiment's product of epoch factors: the live
 * test's closed part grows by what the closing factor gained since the
 * last transfer, and the live verdict rule looks again.
 */
static void
verdict_closing(struct engine *eng, struct experiment *c, struct test *ct)
{
	struct experiment *e = c->owner;
	const struct series *a, *b;
	struct test *t = NULL;
	int i;

	for (i = 0; e != NULL && i < e->ntests; i++)
		if (e->tests[i].g == ct->g &&
		    strcmp(e->tests[i].variant, ct->variant) == 0)
			t = &e->tests[i];
	if (t == NULL || ct->log_e == ct->late_base)
		return;
	t->closed_log_e += ct->log_e - ct->late_base;
	ct->late_base = ct->log_e;
	/* before the new epoch has an estimate of its own, an alert shows
	 * the one its evidence came from */
	if (isnan(t->est) || t->est_closing) {
		t->est_closing = 1;
		t->est = ct->est;
		t->lo = ct->lo;
		t->hi = ct->hi;
		t->ctl_value = ct->ctl_value;
		t->trt_value = ct->trt_value;
		t->ctl_lo = ct->ctl_lo;
		t->ctl_hi = ct->ctl_hi;
		t->trt_lo = ct->trt_lo;
		t->trt_hi = ct->trt_hi;
		t->margin_abs = ct->margin_abs;
		t->V = ct->V;
		t->tau2 = ct->tau2;
		t->deff = ct->deff;
		verdict_set_relative(t);
	}
	if (t->closed_log_e + t->log_e > t->max_log_e)
		t->max_log_e = t->closed_log_e + t->log_e;
	t->hist_dirty = 1;
	if (test_series(e, t, &a, &b) != 0)
		return;
	verdict_set(eng, e, t, &eng->conf->guardrails[t->g], a, b, 0, 0);
}

void
verdict_evaluate(struct engine *eng, struct experiment *e, struct test *t,
    int costly)
{
	const struct conf_guardrail *g = &eng->conf->guardrails[t->g];
	const struct series *a, *b;
	double level = verdict_level(e), n;
	int rc, want_cs = 1, det, qdet = 0;

	if (test_series(e, t, &a, &b) != 0)
		return;
	switch (g->test) {
	case TEST_MEAN:
	case TEST_PROPORTION:
		/* after every record while the arms are small, then each time
		 * they grew by 0.1%: a verdict at most that late, for a hot
		 * path whose cost no longer grows with the record rate */
		n = g->test == TEST_MEAN ? (double)(a->m.n + b->m.n) :
		    (double)(a->r.records + b->r.records);
		if (!verdict_grown(eng, &t->ev_n, n, VERDICT_CHEAP_GROWTH, INFINITY))
			return;
		rc = eval_normal(eng, e, t, g, a, b, level);
		break;
	case TEST_RATE:
		/* an incomplete beta per record is too dear for the hot
		 * path; a subsequence of looks keeps Ville's bound */
		n = (double)(a->r.records + b->r.records);
		if (!costly || !verdict_grown(eng, &t->ev_n, n, VERDICT_EV_GROWTH,
		    VERDICT_EV_MIN_STEP))
			return;
		want_cs = verdict_grown(eng, &t->cs_n, n, VERDICT_CS_GROWTH,
		    VERDICT_CS_MIN_STEP);
		rc = eval_rate(eng, e, t, g, a, b, level, rate_concentration(eng),
		    want_cs);
		break;
	case TEST_QUANTILE:
		if (!costly || a->sk == NULL || b->sk == NULL)
			return;
		n = (double)(sketch_count(a->sk) + sketch_count(b->sk));
		if (!verdict_grown(eng, &t->ev_n, n, VERDICT_EV_GROWTH,
		    VERDICT_EV_MIN_STEP))
			return;
		want_cs = verdict_grown(eng, &t->cs_n, n, VERDICT_CS_GROWTH,
		    VERDICT_CS_MIN_STEP);
		rc = verdict_quantile_eval(eng, e, t, g, a, b, level, want_cs);
		qdet = rc == 0 && !e->is_closing &&
		    verdict_quantile_detect(eng, e, t, g, a, b);
		break;
	default:
		return;
	}
	if (costly)
		t->dirty = 0;
	if (rc != 0)
		return;
	/* a closing epoch only gathers evidence for its experiment */
	if (e->is_closing) {
		verdict_closing(eng, e, t);
		return;
	}
	t->est_closing = 0;
	t->hist_dirty = 1;
	if (t->closed_log_e + t->log_e > t->max_log_e)
		t->max_log_e = t->closed_log_e + t->log_e;
	verdict_set_relative(t);
	if (g->test == TEST_QUANTILE)
		det = qdet;
	else
		det = t->sig2_t > 0 && t->sig2_c > 0 && change_offer(eng, e,
		    t, g, a, b, t->sig2_t, t->sig2_c, t->kfac, t->mlin);
	change_window_offer(eng, t, g, a, b);
	verdict_set(eng, e, t, g, a, b, want_cs, det);
}

/*
 * SRM: the Dirichlet-multinomial Bayes factor against the epoch's
 * weights (Lindon & Malek 2022; docs/methods.md sec. 3) is updated by
 * engine_apply; here its running maximum becomes the verdict. Once it
 * fires, every verdict of the epoch is marked untrustworthy.
 */
void
verdict_srm(struct engine *eng, struct experiment *e)
{
	struct finding f;

	if (e->is_closing)
		return;
	if (e->srm_log_e > e->srm_max_log_e)
		e->srm_max_log_e = e->srm_log_e;
	e->srm_dirty = 1;
	if (e->srm_fired || e->srm_max_log_e < log(1 / e->srm_alpha))
		return;
	e->srm_fired = 1;
	e->srm_first_ts = eng->now;
	e->srm_first_event = eng->event;
	finding_fill_srm(eng, e, FINDING_SRM, &f);
	engine_emit(eng, &f);
	finding_fill_srm(eng, e, FINDING_UNTRUSTED, &f);
	engine_emit(eng, &f);
}
