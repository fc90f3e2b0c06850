/*
 * quantile.c: quantile guardrails (latency p50/p99) without distributional
 * assumptions, after Howard & Ramdas (2022, "Sequential estimation of
 * quantiles with applications to A/B-testing and best-arm
 * identification", Bernoulli 28(3)). The count of samples below a fixed
 * value is a binomial sum, so the beta-binomial mixture of dirichlet.c
 * turns it into a confidence sequence for one quantile, and into a
 * two-sample test by scanning candidate values of the common quantile.
 * Inputs are tie blocks (ascending values with counts): a sketch's
 * buckets or sorted raw data. Formulas: docs/methods.md sec. 4.
 */
#include <math.h>
#include <stdlib.h>

#include "stopcock/stats.h"
#include "stopcock/util.h"
#include "stats_int.h"

/*
 * The two-sample tests are tuned at t_opt samples with alpha_opt = 0.05,
 * the level of docs/methods.md sec. 10.4; the tuning only shapes power, the
 * test stays valid at any alpha.
 */
#define QUANT_ALPHA_OPT	0.05
#define QUANT_BISECT	200

/*
 * What one counted sample stands for: 1, or the inverse of a design
 * effect when samples are clustered in units (an effective sample size;
 * approximate, docs/methods.md sec. 14).
 */
static double
quant_w(const struct stats_blocks *bl)
{
	return bl->weight > 0 && bl->weight <= 1 ? bl->weight : 1;
}

/* Sum of counts, recomputed so a stale total cannot misplace a rank. */
static double
quant_total(const struct stats_blocks *bl)
{
	double t = 0;
	size_t i;

	for (i = 0; i < bl->n; i++)
		t += quant_w(bl) * (double)bl->count[i];
	return t;
}

/* Value of the rank-th order statistic (1-based) within the blocks. */
static double
quant_at_rank(const struct stats_blocks *bl, double rank)
{
	double cum = 0;
	size_t i;

	for (i = 0; i < bl->n; i++) {
		cum += quant_w(bl) * (double)bl->count[i];
		if (cum >= rank)
			return bl->value[i];
	}
	return bl->value[bl->n - 1];
}

/*
 * Two-sided beta-binomial bound with (g, h) = (g, 1 - g), or +inf when
 * even the largest possible sum v/g stays below log(1/alpha): then no
 * data could exclude the far side, and stats_bb_bound's cap at v/g
 * would wrongly turn into the extreme order statistic.
 */
static double
quant_bound(double v, double g, double r, double alpha)
{
	if (stats_bb_logm(v / g, v, g, 1 - g, r, 0) <
	    stats_log_inv_alpha(alpha))
		return INFINITY;
	return stats_bb_bound(v, g, 1 - g, r, alpha, 0);
}

/*
 * Howard & Ramdas 2022, fixed-quantile CS (docs/methods.md sec. 4): with the
 * two-sided beta-binomial bound u at v = p(1-p) t,
 * CS_t = [X_(floor(t p - u_lo) + 1), X_(ceil(t p + u_up))], u_up from
 * (g, h) = (p, 1-p) and u_lo from (1-p, p); one martingale, total alpha.
 */
int
stats_quantile_cs(const struct stats_blocks *bl, double p, double t_opt,
    double alpha, double *lo, double *hi)
{
	double t, v, r, u_up, u_lo, ilo, ihi;

	*lo = -INFINITY;
	*hi = INFINITY;
	if (bl == NULL || bl->n == 0 || !(p > 0) || !(p < 1) ||
	    !(t_opt > 0) || !(alpha > 0) || !(alpha < 1))
		return -1;
	t = quant_total(bl);
	if (!(t > 0))
		return -1;
	v = p * (1 - p) * t;
	r = stats_bb_r(p * (1 - p) * t_opt, p, 1 - p, alpha, 0);
	u_up = quant_bound(v, p, r, alpha);
	u_lo = quant_bound(v, 1 - p, r, alpha);
	ilo = floor(t * p - u_lo) + 1;
	ihi = ceil(t * p + u_up);
	if (ilo >= 1 && ilo <= t)
		*lo = quant_at_rank(bl, ilo);
	if (ihi >= 1 && ihi <= t)
		*hi = quant_at_rank(bl, ihi);
	return 0;
}

/* Digamma for x > 0: recurrence up to 6, then the asymptotic series. */
static double
quant_digamma(double x)
{
	double s = 0, x2;

	while (x < 6) {
		s -= 1 / x;
		x += 1;
	}
	x2 = 1 / (x * x);
	return s + log(x) - 0.5 / x - x2 * (1.0 / 12 - x2 * (1.0 / 120 -
	    x2 * (1.0 / 252 - x2 * (1.0 / 240 - x2 / 132))));
}

/*
 * One arm of a two-sample test: the beta-binomial mixture of HRMS 2021
 * Props. 6/7 for an event count c out of N with null event probability
 * g0, written as the Bayes factor it equals (docs/methods.md sec. 4):
 *   log m(c) = log B(a0 + c, b0 + N - c) - log B(a0, b0)
 *              - c log g0 - (N - c) log(1 - g0)
 *   one-sided: + log I_{1-g0}(b0 + N - c, a0 + c) - log I_{1-g0}(b0, a0)
 * with a0 = k0 g0, b0 = k0 (1 - g0), k0 = r/(g0 (1 - g0)). The prior
 * terms are computed once, and a one-entry cache serves the merged scan,
 * which asks for the same count many times in a row. This is
 * stats_bb_logm with g + h = 1, in double for speed (the scan runs once
 * per tick on up to ~1000 blocks per arm).
 */
struct quant_arm {
	double	N, g0, a0, b0, lg0, lh0, prior;
	int	one_sided;
	double	cstar;		/* two-sided: minimiser over c in [0, N] */
	double	last_c, last;
};

static double
quant_arm_logm(struct quant_arm *q, double c)
{
	double v;

	if (c == q->last_c)
		return q->last;
	if (c < 0)
		c = 0;
	if (c > q->N)
		c = q->N;
	v = stats_lbeta_d(q->a0 + c, q->b0 + q->N - c) - q->prior;
	if (c > 0)
		v -= c * q->lg0;
	if (q->N - c > 0)
		v -= (q->N - c) * q->lh0;
	if (q->one_sided)
		v += stats_log_ibeta_xy(q->b0 + q->N - c, q->a0 + c,
		    1 - q->g0, q->g0);
	q->last_c = c;
	q->last = v;
	return v;
}

/*
 * The two-sided log m is unimodal in c (docs/methods.md sec. 4); its stationary
 * point solves psi(a0 + c) - psi(b0 + N - c) = log(g0 / (1 - g0)), the
 * left side increasing in c, found by bisection.
 */
static double
quant_minimiser(const struct quant_arm *q)
{
	double lo = 0, hi = q->N, mid, target = q->lg0 - q->lh0;
	int i;

	for (i = 0; i < QUANT_BISECT && hi - lo > 1e-12 * (1 + hi); i++) {
		mid = 0.5 * (lo + hi);
		if (quant_digamma(q->a0 + mid) -
		    quant_digamma(q->b0 + q->N - mid) < target)
			lo = mid;
		else
			hi = mid;
	}
	return 0.5 * (lo + hi);
}

static void
quant_arm_init(struct quant_arm *q, double N, double g0, double t_opt,
    int one_sided)
{
	double gh = g0 * (1 - g0), k0;

	k0 = stats_bb_r(t_opt * gh, g0, 1 - g0, QUANT_ALPHA_OPT, one_sided) /
	    gh;
	q->N = N;
	q->g0 = g0;
	q->a0 = k0 * g0;
	q->b0 = k0 * (1 - g0);
	q->lg0 = log(g0);
	q->lh0 = log1p(-g0);
	q->prior = stats_lbeta_d(q->a0, q->b0);
	if (one_sided)
		q->prior += stats_log_ibeta_xy(q->b0, q->a0, 1 - g0, g0);
	q->one_sided = one_sided;
	q->last_c = -1;
	q->last = 0;
	q->cstar = one_sided ? 0 : quant_minimiser(q);
}

/* Two-sided G_j: min of log m over counts in [c0, c1] (clamped minimiser). */
static double
quant_arm_G2(struct quant_arm *q, double c0, double c1)
{
	double c = q->cstar;

	if (c < c0)
		c = c0;
	if (c > c1)
		c = c1;
	return quant_arm_logm(q, c);
}

/*
 * Merged pass over both arms' blocks (docs/methods.md sec. 4): at each distinct
 * value x, count_j(< x) and count_j(<= x); then at the midpoint to the
 * next value, where both equal count_j(<= x).
 * kind 2, two-sided: min_x [G_A(x) + G_B(x)]. A midpoint can be skipped:
 * its counts lie inside the intervals used at the value before it, so its
 * G is never smaller.
 * kind 1, one-sided: min_x [G_A+(x) + G_B-(x)], G_A+ on count_A(< x)
 * (null probability p), G_B- on count_B(> x) (null probability 1 - p).
 */
static double
quant_scan(const struct stats_blocks *a, const struct stats_blocks *b,
    double p, double t_opt, int kind)
{
	struct quant_arm qa, qb;
	double Na, Nb, ca = 0, cb = 0, da, db, x, best = INFINITY, val;
	size_t i = 0, j = 0;

	if (a == NULL || b == NULL || !(p > 0) || !(p < 1) || !(t_opt > 0))
		return 0;
	Na = quant_total(a);
	Nb = quant_total(b);
	if (!(Na > 0) || !(Nb > 0))
		return 0;
	if (kind == 2) {
		quant_arm_init(&qa, Na, p, t_opt, 0);
		quant_arm_init(&qb, Nb, p, t_opt, 0);
	} else {
		quant_arm_init(&qa, Na, p, t_opt, 1);
		quant_arm_init(&qb, Nb, 1 - p, t_opt, 1);
	}
	while (i < a->n || j < b->n) {
		if (j >= b->n || (i < a->n && a->value[i] <= b->value[j]))
			x = a->value[i];
		else
			x = b->value[j];
		da = db = 0;
		while (i < a->n && a->value[i] <= x)
			da += quant_w(a) * (double)a->count[i++];
		while (j < b->n && b->value[j] <= x)
			db += quant_w(b) * (double)b->count[j++];
		if (kind == 2)
			val = quant_arm_G2(&qa, ca, ca + da) +
			    quant_arm_G2(&qb, cb, cb + db);
		else
			val = quant_arm_logm(&qa, ca) +
			    quant_arm_logm(&qb, Nb - (cb + db));
		if (val < best)
			best = val;
		ca += da;
		cb += db;
		if (kind == 2 || (i >= a->n && j >= b->n))
			continue;
		/* midpoint to the next distinct value */
		val = quant_arm_logm(&qa, ca) + quant_arm_logm(&qb, Nb - cb);
		if (val < best)
			best = val;
	}
	return isnan(best) ? 0 : best;
}

/*
 * One-sided scan by branch and bound. At the i-th distinct value x_i the
 * evidence is f_i + g_i with f_i = log m_A(#A < x_i), nondecreasing in i
 * (the one-sided factor grows with its count and the count with x), and
 * g_i = log m_B(#B > x_i), nonincreasing in i. So over candidates l..r
 * the sum is at least f_l + g_r, and whole ranges whose bound already
 * exceeds the best value found are skipped. Midpoints between values are
 * never needed: at a midpoint #A below grows while #B above stays, so its
 * sum is at least the one at the value before it. The answer equals the
 * full scan's; only the number of incomplete-beta evaluations falls, from
 * one per bucket to a few dozen near the minimum.
 */
struct quant_bb {
	struct quant_arm	 qa, qb;
	const double		*aless;		/* #A < x_i */
	const double		*bmore;		/* #B > x_i */
	double			*fv, *gv;	/* memo of f_i, g_i (NAN: not yet) */
	double			 best;
};

static double
quant_bb_f(struct quant_bb *s, size_t i)
{
	if (isnan(s->fv[i]))
		s->fv[i] = quant_arm_logm(&s->qa, s->aless[i]);
	return s->fv[i];
}

static double
quant_bb_g(struct quant_bb *s, size_t i)
{
	if (isnan(s->gv[i]))
		s->gv[i] = quant_arm_logm(&s->qb, s->bmore[i]);
	return s->gv[i];
}

static void
quant_bb_at(struct quant_bb *s, size_t i)
{
	double v = quant_bb_f(s, i) + quant_bb_g(s, i);

	if (v < s->best)
		s->best = v;
}

static void
quant_bb_range(struct quant_bb *s, size_t l, size_t r)
{
	size_t m, i;

	while (l <= r) {
		if (quant_bb_f(s, l) + quant_bb_g(s, r) >= s->best)
			return;
		if (r - l < 3) {
			for (i = l; i <= r; i++)
				quant_bb_at(s, i);
			return;
		}
		m = l + (r - l) / 2;
		quant_bb_at(s, m);
		quant_bb_range(s, l, m - 1);
		l = m + 1;
	}
}

static double
quant_scan1(const struct stats_blocks *a, const struct stats_blocks *b,
    double p, double t_opt)
{
	struct quant_bb s;
	double Na, Nb, ca = 0, cb = 0, x, *buf;
	size_t i = 0, j = 0, n = 0, lo, hi, mid, cap;

	if (a == NULL || b == NULL || !(p > 0) || !(p < 1) || !(t_opt > 0))
		return 0;
	Na = quant_total(a);
	Nb = quant_total(b);
	if (!(Na > 0) || !(Nb > 0))
		return 0;
	quant_arm_init(&s.qa, Na, p, t_opt, 1);
	quant_arm_init(&s.qb, Nb, 1 - p, t_opt, 1);
	cap = a->n + b->n;
	buf = xreallocarray(NULL, cap, 4 * sizeof *buf);
	s.aless = buf;
	s.bmore = buf + cap;
	s.fv = buf + 2 * cap;
	s.gv = buf + 3 * cap;
	while (i < a->n || j < b->n) {
		if (j >= b->n || (i < a->n && a->value[i] <= b->value[j]))
			x = a->value[i];
		else
			x = b->value[j];
		buf[n] = ca;
		while (i < a->n && a->value[i] <= x)
			ca += quant_w(a) * (double)a->count[i++];
		while (j < b->n && b->value[j] <= x)
			cb += quant_w(b) * (double)b->count[j++];
		buf[cap + n] = Nb - cb;
		s.fv[n] = s.gv[n] = NAN;
		n++;
	}
	s.best = INFINITY;
	/*
	 * Seed the bound near the minimum: f - g increases with i, and the
	 * sum is smallest around where it changes sign, found by bisection
	 * in O(log n) evaluations. With a good best, the ranges far from it
	 * are pruned at once.
	 */
	lo = 0;
	hi = n - 1;
	while (hi - lo > 1) {
		mid = lo + (hi - lo) / 2;
		if (quant_bb_f(&s, mid) < quant_bb_g(&s, mid))
			lo = mid;
		else
			hi = mid;
	}
	quant_bb_at(&s, lo);
	quant_bb_at(&s, hi);
	quant_bb_range(&s, 0, n - 1);
	free(buf);
	return isnan(s.best) ? 0 : s.best;
}

/* Howard & Ramdas 2022, Thm. 5: H0 Q_a(p) = Q_b(p). */
double
stats_quantile_log_e2(const struct stats_blocks *a,
    const struct stats_blocks *b, double p, double t_opt)
{
	return quant_scan(a, b, p, t_opt, 2);
}

/*
 * H0: Q_b(p) <= Q_a(p), our construction (docs/methods.md sec. 4): under H0
 * any x in [Q_b, Q_a] makes both one-sided arm factors supermartingales,
 * so the minimum over x bounds a test supermartingale.
 */
double
stats_quantile_log_e1(const struct stats_blocks *a,
    const struct stats_blocks *b, double p, double t_opt)
{
	return quant_scan1(a, b, p, t_opt);
}
