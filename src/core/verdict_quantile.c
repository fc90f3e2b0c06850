/*
 * verdict_quantile.c: one look of a quantile guardrail. Each arm's
 * sketch is read once per look into the engine's view arrays (values at
 * both bucket sides, counts, and the unit groups' blocks when records
 * carry units); the two-sample evidence, the confidence sequence, the
 * change detector's tails and the bound reported with a harm verdict
 * all read those views, so a look costs one pass over each sketch.
 */
#include <math.h>
#include <string.h>

#include "stopcock/util.h"
#include "verdict_int.h"

static void
verdict_quantile_scratch(struct engine *eng, size_t need)
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
verdict_quantile_view_fill(struct engine *eng, const struct sketch *sk, size_t off,
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
verdict_quantile_blocks(struct engine *eng, const struct arm_view *vw, size_t off,
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
verdict_quantile_weights(const struct test *t, double wt[2])
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
int
verdict_quantile_eval(struct engine *eng, struct experiment *e, struct test *t,
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
		if (verdict_quantile_weights(t, wt) != 0)
			return -1;
	} else
		wt[0] = wt[1] = 1;
	need = sketch_nbuckets(a->sk) + sketch_nbuckets(b->sk) + 2;
	verdict_quantile_scratch(eng, need);
	half = eng->scratch_n / 2;
	verdict_quantile_view_fill(eng, a->sk, 0, &va);
	verdict_quantile_view_fill(eng, b->sk, half, &vb);
	t->ctl_value = sketch_quantile(a->sk, q);
	t->trt_value = sketch_quantile(b->sk, q);
	t->est = t->trt_value - t->ctl_value;
	t->margin_abs = verdict_margin_abs(g, t->ctl_value);
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
		verdict_quantile_blocks(eng, &va, 0, 1, (1 + acc) / (1 - acc), scale,
		    shift, &ba);
		verdict_quantile_blocks(eng, &vb, half, -1, 1, 1, 0, &bb);
		ba.weight = wt[0];
		bb.weight = wt[1];
		t->log_e = stats_quantile_log_e1(&ba, &bb, q, plan_units_of(g, e));
	} else {
		scale = g->margin_relative ? 1 - m : 1;
		shift = g->margin_relative ? 0 : -m * (1 - acc);
		verdict_quantile_blocks(eng, &va, 0, -1, (1 - acc) / (1 + acc), scale,
		    shift, &ba);
		verdict_quantile_blocks(eng, &vb, half, 1, 1, 1, 0, &bb);
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
	verdict_quantile_blocks(eng, &va, 0, -1, 1, 1, 0, &ca);
	verdict_quantile_blocks(eng, &vb, half, -1, 1, 1, 0, &cb);
	ca.weight = wt[0];
	cb.weight = wt[1];
	if (stats_quantile_cs(&ca, q, plan_units_of(g, e), level / 2, &t->ctl_lo,
	    &t->ctl_hi) != 0 || stats_quantile_cs(&cb, q, plan_units_of(g, e),
	    level / 2, &t->trt_lo, &t->trt_hi) != 0)
		return 0;
	if (sketch_edge_count(a->sk) != 0 || sketch_edge_count(b->sk) != 0) {
		double dummy;

		verdict_quantile_blocks(eng, &va, 0, 1, 1, 1, 0, &ca);
		verdict_quantile_blocks(eng, &vb, half, 1, 1, 1, 0, &cb);
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
	verdict_cs_intersect(t, t->lo, t->hi);
	return 0;
}

/*
 * Records of a sketch beyond x (above, or below when !above), its edges
 * read at their lowest (side < 0) or highest (side > 0) value.
 */
static double
verdict_quantile_tail(struct engine *eng, const struct sketch *sk, double x, int above,
    int side)
{
	size_t i, n;
	double c = 0;

	verdict_quantile_scratch(eng, sketch_nbuckets(sk) + 1);
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
int
verdict_quantile_detect(struct engine *eng, struct experiment *e, struct test *t,
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
	    verdict_quantile_weights(t, wt) != 0)
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
	t->qd_cum[0][1] = verdict_quantile_tail(eng, a->sk, x0, up, up ? 1 : -1);
	t->qd_cum[1][0] = t->qd_cum[1][2] = (double)sketch_count(b->sk);
	t->qd_cum[1][1] = verdict_quantile_tail(eng, b->sk, xb, up, up ? -1 : 1);
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
void
verdict_quantile_harm_bound(struct engine *eng, struct experiment *e, struct test *t,
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
	verdict_quantile_view_fill(eng, a->sk, 0, &va);
	verdict_quantile_view_fill(eng, b->sk, eng->scratch_n / 2, &vb);
	for (i = 0; i < 30 && hi - lo > 1e-4; i++) {
		mid = 0.5 * (lo + hi);
		m = g->harm == HARM_INCREASE ? 1 + mid : 1 - mid;
		verdict_quantile_blocks(eng, &va, 0, g->harm == HARM_INCREASE ? 1 : -1, 1,
		    m, 0, &ba);
		verdict_quantile_blocks(eng, &vb, eng->scratch_n / 2,
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
	verdict_set_relative(t);
}
