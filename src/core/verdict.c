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
 */
#include <math.h>
#include <string.h>

#include "stopcock/util.h"
#include "engine_int.h"

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

static double
margin_abs(const struct conf_guardrail *g, double control)
{
	if (!g->margin_relative)
		return g->margin;
	return isfinite(control) ? g->margin * fabs(control) : 0;
}

static void
cs_intersect(struct test *t, double lo, double hi)
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

static void
set_relative(struct test *t)
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
	t->margin_abs = margin_abs(g, ca.value);
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
	cs_intersect(t, t->lo, t->hi);
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
	t->margin_abs = margin_abs(g, ra);
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
	t->margin_abs = margin_abs(g, ra);
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
		cs_intersect(t, t->lo, t->hi);
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

static int
grown(const struct engine *eng, double *last, double n, double growth,
    double step)
{
	if (n <= *last || (!eng->force && n < *last * growth &&
	    n < *last + step))
		return 0;
	*last = n;
	return 1;
}

static void
scratch_reserve(struct engine *eng, size_t need)
{
	if (eng->scratch_n >= 2 * need)
		return;
	eng->scratch_n = 2 * need;
	eng->scratch_v = xreallocarray(eng->scratch_v, eng->scratch_n,
	    sizeof *eng->scratch_v);
	eng->scratch_c = xreallocarray(eng->scratch_c, eng->scratch_n,
	    sizeof *eng->scratch_c);
	eng->view_lo = xreallocarray(eng->view_lo, eng->scratch_n,
	    sizeof *eng->view_lo);
	eng->view_hi = xreallocarray(eng->view_hi, eng->scratch_n,
	    sizeof *eng->view_hi);
	eng->view_c = xreallocarray(eng->view_c, eng->scratch_n,
	    sizeof *eng->view_c);
}

/*
 * One arm's buckets for a whole look: a look reads each arm's sketch
 * four to six times (both tests' sides, the CS at both edge readings),
 * and the sketch does not change in between, so its values (an exp per
 * bucket) are taken once, at both sides, into the engine's view arrays
 * at off (0 or scratch_n / 2, as the scratch).
 */
struct arm_view {
	const double	*lo, *hi;
	const uint64_t	*c;
	size_t		 n;
};

static void
view_fill(struct engine *eng, const struct sketch *sk, size_t off,
    struct arm_view *v)
{
	v->n = sketch_buckets_sides(sk, eng->view_lo + off,
	    eng->view_hi + off, eng->view_c + off, eng->scratch_n / 2);
	v->lo = eng->view_lo + off;
	v->hi = eng->view_hi + off;
	v->c = eng->view_c + off;
}

/*
 * Fill the engine's scratch with an arm's blocks: each bucket's value
 * moved by the factor w away from zero (w > 1) or towards it (w < 1),
 * then scaled and shifted. The widening puts a bucket at the edge of the
 * values it may hold (relative error a: w = (1 + a)/(1 - a) or its
 * inverse), so a margin is decided on the conservative side of the
 * sketch's resolution. side puts the sketch's edges (values beyond its
 * buckets, known only by their range) at their lowest (side < 0) or
 * highest (side > 0) value: the arm whose rise is harm reads them low,
 * the other high, so values folded or far out never make harm
 * (sketch_buckets_side).
 */
static void
blocks_view(struct engine *eng, const struct arm_view *vw, size_t off,
    int side, double w, double scale, double shift, struct stats_blocks *out)
{
	const double *src = side < 0 ? vw->lo : vw->hi;
	uint64_t total = 0;
	size_t i;
	double v;

	for (i = 0; i < vw->n; i++) {
		v = src[i];
		v = v >= 0 ? v * w : v / w;
		eng->scratch_v[off + i] = v * scale + shift;
		total += vw->c[i];
	}
	out->value = eng->scratch_v + off;
	out->count = vw->c;
	out->n = vw->n;
	out->total = total;
	out->weight = 1;
}

/*
 * Weights (1 / design effect) of the two arms of a quantile test on a
 * grouped metric, from the unit groups of the exceedance indicator at
 * each arm's frozen threshold: v(R) (kappa-inflated) over the binomial
 * R (1 - R) / N, floored at 1. -1 while either arm has too few groups.
 */
static int
quantile_weights(const struct test *t, double wt[2])
{
	const struct groups *gp;
	double R, v, kappa, vb, q = t->tail_q > 0 ? t->tail_q : 4e-4, N;
	uint32_t i, used;
	int side;

	for (side = 0; side < 2; side++) {
		if ((gp = t->qg[side]) == NULL)
			return -1;
		for (i = used = 0, N = 0; i < gp->G; i++) {
			used += gp->sn[2 * (size_t)i + 1] != 0;
			N += gp->sn[2 * (size_t)i + 1];
		}
		if (used < ENGINE_GROUPS_MIN)
			return -1;
		v = stats_group_var_strided((int)gp->G, gp->sn, gp->sn + 1, 2,
		    &R);
		kappa = stats_group_kappa(used - 1, q);
		if (isfinite(kappa) && kappa > 1)
			v *= kappa;
		vb = R * (1 - R) / N;
		wt[side] = vb > 0 && v > vb ? vb / v : 1;
	}
	return 0;
}

/*
 * Quantile: one-sided sequential comparison on sketch buckets (Howard &
 * Ramdas 2022; docs/methods.md sec. 4). The margin enters by scaling (or
 * shifting) the control's values, so H0 is Q_b <= (1 + m) Q_a for an
 * increase. Bucket indices are monotone in the value, so validity holds
 * for the rounded distributions, i.e. at sketch resolution.
 */
static int
eval_quantile(struct engine *eng, struct experiment *e, struct test *t,
    const struct conf_guardrail *g, const struct series *a,
    const struct series *b, double level, int want_cs)
{
	struct stats_blocks ba, bb, ca, cb;
	struct arm_view va, vb;
	double q = g->quantile, scale, shift, m, acc, wt[2];
	size_t need, half;

	if (a->sk == NULL || b->sk == NULL || sketch_count(a->sk) == 0 ||
	    sketch_count(b->sk) == 0)
		return -1;
	/* records clustered in units: each counts as 1/deff of a sample,
	 * and none is tested before the design effect can be measured */
	if (a->grp != NULL || b->grp != NULL) {
		if (quantile_weights(t, wt) != 0)
			return -1;
	} else
		wt[0] = wt[1] = 1;
	need = sketch_nbuckets(a->sk) + sketch_nbuckets(b->sk) + 2;
	scratch_reserve(eng, need);
	half = eng->scratch_n / 2;
	view_fill(eng, a->sk, 0, &va);
	view_fill(eng, b->sk, half, &vb);
	t->ctl_value = sketch_quantile(a->sk, q);
	t->trt_value = sketch_quantile(b->sk, q);
	t->est = t->trt_value - t->ctl_value;
	t->margin_abs = margin_abs(g, t->ctl_value);
	m = g->margin;
	/*
	 * Resolution: a bucket's value is within a relative a of every value
	 * it holds. For "increase" the control is taken at the top of its
	 * buckets and the treatment at the bottom (both scaled by 1 + a,
	 * hence w and the shift's factor), for "decrease" the reverse, so an
	 * effect exactly at the margin never reads as beyond it.
	 */
	/* each sketch keeps the accuracy it was built with across reloads */
	acc = fmax(sketch_accuracy(a->sk), sketch_accuracy(b->sk));
	if (!(acc > 0 && acc < 1))
		acc = eng->conf->sketch_accuracy;
	/* without a margin both arms share one bucket grid and bucket order
	 * is value order: the rounded comparison is already exact there */
	if (m == 0)
		acc = 0;
	if (g->harm == HARM_INCREASE) {
		scale = g->margin_relative ? 1 + m : 1;
		shift = g->margin_relative ? 0 : m * (1 + acc);
		blocks_view(eng, &va, 0, 1, (1 + acc) / (1 - acc), scale,
		    shift, &ba);
		blocks_view(eng, &vb, half, -1, 1, 1, 0, &bb);
		ba.weight = wt[0];
		bb.weight = wt[1];
		t->log_e = stats_quantile_log_e1(&ba, &bb, q, plan_units_of(g, e));
	} else {
		scale = g->margin_relative ? 1 - m : 1;
		shift = g->margin_relative ? 0 : -m * (1 - acc);
		blocks_view(eng, &va, 0, -1, (1 - acc) / (1 + acc), scale,
		    shift, &ba);
		blocks_view(eng, &vb, half, 1, 1, 1, 0, &bb);
		ba.weight = wt[0];
		bb.weight = wt[1];
		/* H0: Q_a' <= Q_b, i.e. the treatment is not lower */
		t->log_e = stats_quantile_log_e1(&bb, &ba, q, plan_units_of(g, e));
	}
	if (!want_cs)
		return 0;
	/* Per-arm CSs at level/2 each: the difference's bounds hold
	 * jointly by a union bound. An arm with edges takes its lower bound
	 * with the edges at their lowest values, its upper at their highest
	 * (the same martingale, so still one CS at level/2). */
	blocks_view(eng, &va, 0, -1, 1, 1, 0, &ca);
	blocks_view(eng, &vb, half, -1, 1, 1, 0, &cb);
	ca.weight = wt[0];
	cb.weight = wt[1];
	if (stats_quantile_cs(&ca, q, plan_units_of(g, e), level / 2, &t->ctl_lo,
	    &t->ctl_hi) != 0 || stats_quantile_cs(&cb, q, plan_units_of(g, e),
	    level / 2, &t->trt_lo, &t->trt_hi) != 0)
		return 0;
	if (sketch_edge_count(a->sk) != 0 || sketch_edge_count(b->sk) != 0) {
		double dummy;

		blocks_view(eng, &va, 0, 1, 1, 1, 0, &ca);
		blocks_view(eng, &vb, half, 1, 1, 1, 0, &cb);
		ca.weight = wt[0];
		cb.weight = wt[1];
		if (stats_quantile_cs(&ca, q, plan_units_of(g, e), level / 2,
		    &dummy, &t->ctl_hi) != 0 || stats_quantile_cs(&cb, q,
		    plan_units_of(g, e), level / 2, &dummy, &t->trt_hi) != 0)
			return 0;
	}
	t->lo = t->trt_lo - t->ctl_hi;
	t->hi = t->trt_hi - t->ctl_lo;
	if (isnan(t->lo))
		t->lo = -INFINITY;
	if (isnan(t->hi))
		t->hi = INFINITY;
	cs_intersect(t, t->lo, t->hi);
	return 0;
}

/*
 * Records of a sketch beyond x (above, or below when !above), its edges
 * read at their lowest (side < 0) or highest (side > 0) value.
 */
static double
tail_count(struct engine *eng, const struct sketch *sk, double x, int above,
    int side)
{
	size_t i, n;
	double c = 0;

	scratch_reserve(eng, sketch_nbuckets(sk) + 1);
	n = sketch_buckets_side(sk, side, eng->scratch_v, eng->scratch_c,
	    eng->scratch_n / 2);
	for (i = 0; i < n; i++)
		if (above ? eng->scratch_v[i] > x : eng->scratch_v[i] < x)
			c += (double)eng->scratch_c[i];
	return c;
}

/*
 * The quantile's change detector (change.c change_offer_quantile): the
 * share of each arm's values beyond the control's quantile x0, frozen
 * once the control holds ENGINE_QUANTILE_FREEZE records. The treatment's
 * threshold is x0 moved by the margin and put on the conservative side of
 * the resolution (both bucket edges), so an effect at the margin does not
 * raise the treatment's share; without a margin both arms share one
 * bucket grid and the comparison is exact. Returns 1 on an alarm.
 */
static int
quantile_detect(struct engine *eng, struct experiment *e, struct test *t,
    const struct conf_guardrail *g, const struct series *a,
    const struct series *b)
{
	double acc, x0, xb, r = g->margin, wt[2] = { 1, 1 }, deff;
	int up = g->harm == HARM_INCREASE;

	if (isnan(t->qd_x0)) {
		if (sketch_count(a->sk) < ENGINE_QUANTILE_FREEZE)
			return 0;
		t->qd_x0 = sketch_quantile(a->sk, g->quantile);
	}
	x0 = t->qd_x0;
	if (!isfinite(x0))
		return 0;
	if ((a->grp != NULL || b->grp != NULL) &&
	    quantile_weights(t, wt) != 0)
		return 0;
	deff = 1 / fmin(wt[0] > 0 ? wt[0] : 1, wt[1] > 0 ? wt[1] : 1);
	acc = r == 0 ? 0 : fmax(sketch_accuracy(a->sk),
	    sketch_accuracy(b->sk));
	if (!(acc >= 0 && acc < 1))
		acc = eng->conf->sketch_accuracy;
	if (up)
		xb = g->margin_relative ? x0 * (1 + acc) * (1 + r) /
		    (1 - acc) : (x0 * (1 + acc) + r) / (1 - acc);
	else
		xb = g->margin_relative ? x0 * (1 - acc) * (1 - r) /
		    (1 + acc) : (x0 * (1 - acc) - r) / (1 + acc);
	t->qd_cum[0][0] = t->qd_cum[0][2] = (double)sketch_count(a->sk);
	/* edges on the side that does not make harm: the control's
	 * exceedances counted at most, the treatment's at least */
	t->qd_cum[0][1] = tail_count(eng, a->sk, x0, up, up ? 1 : -1);
	t->qd_cum[1][0] = t->qd_cum[1][2] = (double)sketch_count(b->sk);
	t->qd_cum[1][1] = tail_count(eng, b->sk, xb, up, up ? -1 : 1);
	return change_offer_quantile(eng, e, t, g, t->qd_cum[0][0],
	    t->qd_cum[0][1], t->qd_cum[1][0], t->qd_cum[1][1], deff);
}

/*
 * At a quantile harm verdict, tighten the lower bound to what the test
 * itself established: the largest relative (or absolute) shift m of the
 * control's quantile that the one-sided test still rejects at the level.
 * The per-arm union bound is kept when it is already tighter. Found by
 * bisection on m (the evidence falls as m grows); run once per verdict.
 */
static void
quantile_harm_bound(struct engine *eng, struct experiment *e, struct test *t,
    const struct conf_guardrail *g, const struct series *a,
    const struct series *b, double level)
{
	struct stats_blocks ba, bb;
	struct arm_view va, vb;
	double target = log(1 / level), lo, hi, mid, m, c = t->ctl_value;
	int i, rel = g->margin_relative || g->margin == 0;

	if (!isfinite(c) || c <= 0 || !isfinite(t->est))
		return;
	lo = rel ? g->margin : g->margin / c;	/* as a relative shift */
	hi = fabs(t->est) / c;
	if (!(hi > lo))
		return;
	/* the scratch as eval_quantile reserved it for these sketches */
	view_fill(eng, a->sk, 0, &va);
	view_fill(eng, b->sk, eng->scratch_n / 2, &vb);
	for (i = 0; i < 30 && hi - lo > 1e-4; i++) {
		mid = 0.5 * (lo + hi);
		m = g->harm == HARM_INCREASE ? 1 + mid : 1 - mid;
		blocks_view(eng, &va, 0, g->harm == HARM_INCREASE ? 1 : -1, 1,
		    m, 0, &ba);
		blocks_view(eng, &vb, eng->scratch_n / 2,
		    g->harm == HARM_INCREASE ? -1 : 1, 1, 1, 0, &bb);
		if ((g->harm == HARM_INCREASE ?
		    stats_quantile_log_e1(&ba, &bb, g->quantile,
		    plan_units_of(g, e)) :
		    stats_quantile_log_e1(&bb, &ba, g->quantile,
		    plan_units_of(g, e))) >= target)
			lo = mid;
		else
			hi = mid;
	}
	if (g->harm == HARM_INCREASE && lo * c > t->cs_lo)
		t->cs_lo = lo * c;
	else if (g->harm == HARM_DECREASE && -lo * c < t->cs_hi)
		t->cs_hi = -lo * c;
	set_relative(t);
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
			(void)eval_quantile(eng, e, t, g, a, b, level, 1);
		else if (!want_cs && g->test == TEST_RATE)
			(void)eval_rate(eng, e, t, g, a, b, level,
			    rate_concentration(eng), 1);
		if (nv == VERDICT_HARM && g->test == TEST_QUANTILE)
			quantile_harm_bound(eng, e, t, g, a, b, level);
		if (nv == VERDICT_HARM && g->test == TEST_RATE)
			rate_harm_bound(t, g, a, b, level,
			    rate_concentration(eng));
		if (nv == VERDICT_HARM && (g->test == TEST_MEAN ||
		    g->test == TEST_PROPORTION))
			normal_harm_bound(t, g, level);
		set_relative(t);
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
		set_relative(t);
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
		if (!grown(eng, &t->ev_n, n, VERDICT_CHEAP_GROWTH, INFINITY))
			return;
		rc = eval_normal(eng, e, t, g, a, b, level);
		break;
	case TEST_RATE:
		/* an incomplete beta per record is too dear for the hot
		 * path; a subsequence of looks keeps Ville's bound */
		n = (double)(a->r.records + b->r.records);
		if (!costly || !grown(eng, &t->ev_n, n, VERDICT_EV_GROWTH,
		    VERDICT_EV_MIN_STEP))
			return;
		want_cs = grown(eng, &t->cs_n, n, VERDICT_CS_GROWTH,
		    VERDICT_CS_MIN_STEP);
		rc = eval_rate(eng, e, t, g, a, b, level, rate_concentration(eng),
		    want_cs);
		break;
	case TEST_QUANTILE:
		if (!costly || a->sk == NULL || b->sk == NULL)
			return;
		n = (double)(sketch_count(a->sk) + sketch_count(b->sk));
		if (!grown(eng, &t->ev_n, n, VERDICT_EV_GROWTH,
		    VERDICT_EV_MIN_STEP))
			return;
		want_cs = grown(eng, &t->cs_n, n, VERDICT_CS_GROWTH,
		    VERDICT_CS_MIN_STEP);
		rc = eval_quantile(eng, e, t, g, a, b, level, want_cs);
		qdet = rc == 0 && !e->is_closing &&
		    quantile_detect(eng, e, t, g, a, b);
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
	set_relative(t);
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
