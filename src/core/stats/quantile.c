/*
 * quantile.c: quantile guardrails (latency p50/p99) without distributional
 * assumptions, after Howard & Ramdas (2022, "Sequential estimation of
 * quantiles with applications to A/B-testing and best-arm
 * identification", Bernoulli 28(3)). The count of samples below a fixed
 * value is a binomial sum, so the beta-binomial mixture of dirichlet.c
 * turns it into a confidence sequence for one quantile, and into a
 * two-sample test by scanning candidate values of the common quantile.
 * Inputs are tie blocks (ascending values with counts): a sketch's
 * buckets or sorted raw data. Formulas: METHODS.md sec. 4.
 */
#include <math.h>

#include "stopcock/stats.h"
#include "stats_int.h"

/*
 * The two-sample tests are tuned at t_opt samples with alpha_opt = 0.05,
 * the level of METHODS.md sec. 10.4; the tuning only shapes power, the
 * test stays valid at any alpha.
 */
#define QUANT_ALPHA_OPT	0.05
#define QUANT_BISECT	200

/* Sum of counts, recomputed so a stale total cannot misplace a rank. */
static double
quant_total(const struct stats_blocks *bl)
{
	double t = 0;
	size_t i;

	for (i = 0; i < bl->n; i++)
		t += (double)bl->count[i];
	return t;
}

/* Value of the rank-th order statistic (1-based) within the blocks. */
static double
quant_at_rank(const struct stats_blocks *bl, double rank)
{
	double cum = 0;
	size_t i;

	for (i = 0; i < bl->n; i++) {
		cum += (double)bl->count[i];
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
 * Howard & Ramdas 2022, fixed-quantile CS (METHODS.md sec. 4): with the
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
 * One arm of a two-sample test: log m of the beta-binomial mixture as a
 * function of an event count c out of N (s = c - N g0 where g0 is the
 * null event probability), with a one-entry cache because the merged
 * scan asks for the same count many times in a row.
 */
struct quant_arm {
	const struct stats_blocks *bl;
	double	N, v, g, h, r;
	int	one_sided;
	double	cstar;		/* two-sided: minimiser over c in [0, N] */
	double	last_c, last;
};

static double
quant_arm_logm(struct quant_arm *q, double c)
{
	if (c == q->last_c)
		return q->last;
	q->last_c = c;
	q->last = stats_bb_logm(c - q->N * q->g, q->v, q->g, q->h, q->r,
	    q->one_sided);
	return q->last;
}

/*
 * The two-sided log m is unimodal in c (METHODS.md sec. 4); its stationary
 * point solves log(h/g) + psi(B) - psi(A) = 0 with A, B the posterior
 * beta parameters of HRMS Prop. 6, increasing in c, found by bisection.
 */
static double
quant_minimiser(const struct quant_arm *q)
{
	double lo = 0, hi = q->N, mid, s, A, B, gh = q->g + q->h;
	int i;

	for (i = 0; i < QUANT_BISECT && hi - lo > 1e-12 * (1 + hi); i++) {
		mid = 0.5 * (lo + hi);
		s = mid - q->N * q->g;
		A = (q->r + q->v - q->g * s) / (q->g * gh);
		B = (q->r + q->v + q->h * s) / (q->h * gh);
		if (log(q->h / q->g) + quant_digamma(B) - quant_digamma(A) < 0)
			lo = mid;
		else
			hi = mid;
	}
	return 0.5 * (lo + hi);
}

static void
quant_arm_init(struct quant_arm *q, const struct stats_blocks *bl,
    double N, double g, double t_opt, int one_sided)
{
	q->bl = bl;
	q->N = N;
	q->g = g;
	q->h = 1 - g;
	q->v = N * g * (1 - g);
	q->r = stats_bb_r(t_opt * g * (1 - g), g, 1 - g, QUANT_ALPHA_OPT,
	    one_sided);
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
 * Merged pass over both arms' blocks (METHODS.md sec. 4): at each distinct
 * value x, count_j(< x) and count_j(<= x); then at the midpoint to the
 * next value, where both equal count_j(<= x). kind 2: two-sided,
 * min_x [G_A(x) + G_B(x)]; kind 1: one-sided, min_x [G_A+(x) + G_B-(x)]
 * with G_A+ on count_A(< x) and G_B- on count_B(> x).
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
		quant_arm_init(&qa, a, Na, p, t_opt, 0);
		quant_arm_init(&qb, b, Nb, p, t_opt, 0);
	} else {
		/* A: events "below x", null prob p; B: "above x", 1 - p */
		quant_arm_init(&qa, a, Na, p, t_opt, 1);
		quant_arm_init(&qb, b, Nb, 1 - p, t_opt, 1);
	}
	while (i < a->n || j < b->n) {
		if (j >= b->n || (i < a->n && a->value[i] <= b->value[j]))
			x = a->value[i];
		else
			x = b->value[j];
		da = db = 0;
		while (i < a->n && a->value[i] <= x)
			da += (double)a->count[i++];
		while (j < b->n && b->value[j] <= x)
			db += (double)b->count[j++];
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
		if (i >= a->n && j >= b->n)
			break;
		/* midpoint to the next distinct value */
		if (kind == 2)
			val = quant_arm_logm(&qa, ca) +
			    quant_arm_logm(&qb, cb);
		else
			val = quant_arm_logm(&qa, ca) +
			    quant_arm_logm(&qb, Nb - cb);
		if (val < best)
			best = val;
	}
	return isnan(best) ? 0 : best;
}

/* Howard & Ramdas 2022, Thm. 5: H0 Q_a(p) = Q_b(p). */
double
stats_quantile_log_e2(const struct stats_blocks *a,
    const struct stats_blocks *b, double p, double t_opt)
{
	return quant_scan(a, b, p, t_opt, 2);
}

/*
 * H0: Q_b(p) <= Q_a(p), our construction (METHODS.md sec. 4): under H0
 * any x in [Q_b, Q_a] makes both one-sided arm factors supermartingales,
 * so the minimum over x bounds a test supermartingale.
 */
double
stats_quantile_log_e1(const struct stats_blocks *a,
    const struct stats_blocks *b, double p, double t_opt)
{
	return quant_scan(a, b, p, t_opt, 1);
}
