/*
 * dirichlet.c: conjugate Bayes factors on counts. The sequential SRM check
 * is the Dirichlet-multinomial Bayes factor of Lindon & Malek (2022); the
 * rate guardrails (events over exposure) are its two-arm case with the
 * exposure share as null; the beta-binomial mixture of Howard, Ramdas,
 * McAuliffe & Sekhon (2021, Props. 6/7) gives boundaries for Bernoulli
 * means and quantiles, and is the same Bayes factor in other coordinates
 * (docs/methods.md sec. 3-5). Sums whose terms grow like N log N but cancel to
 * O(1) are done in long double (N up to 10^12).
 */
#include <float.h>
#include <math.h>

#include "stopcock/stats.h"
#include "stats_int.h"

#define DIR_BISECT_MAX	200
/* Logit range searched when inverting the rate test: beyond, r is 0/inf. */
#define DIR_LOGIT_MAX	600.0

static int
dir_valid(int K, const double *counts, const double *theta0)
{
	int i;

	if (K < 1 || K > STATS_ARMS_MAX)
		return 0;
	for (i = 0; i < K; i++) {
		if (!(counts[i] >= 0) || !isfinite(counts[i]))
			return 0;
		if (!(theta0[i] >= 0) || !isfinite(theta0[i]))
			return 0;
	}
	return 1;
}

/* Sum of theta0, so designs given as weights (50, 50) work as (.5, .5). */
static long double
dir_theta_sum(int K, const double *theta0)
{
	long double s = 0;
	int i;

	for (i = 0; i < K; i++)
		s += theta0[i];
	return s;
}

/*
 * - sum_i x_i log theta0_i with theta0 normalised; 0 log 0 := 0 and a
 * count where the null puts no mass is infinite evidence.
 */
static long double
dir_null_loglik(int K, const double *x, const double *theta0, long double ts)
{
	long double s = 0;
	int i;

	for (i = 0; i < K; i++) {
		if (x[i] == 0)
			continue;
		if (theta0[i] == 0)
			return -INFINITY;
		s += x[i] * logl(theta0[i] / ts);
	}
	return s;
}

/*
 * Lindon & Malek 2022 (docs/methods.md sec. 3), batch update:
 * dlog BF = sum_j [lgamma(a_j + x_j) - lgamma(a_j)] - [lgamma(A + m) -
 * lgamma(A)] - sum_j x_j log theta0_j; then a += x. Order-invariant, so
 * the full Bayes factor is one batch from the prior.
 */
static long double
dir_update_l(int K, double *a, const double *x, const double *theta0)
{
	long double A = 0, m = 0, s = 0, ll, ts;
	int i;

	ts = dir_theta_sum(K, theta0);
	if (!(ts > 0))
		return NAN;
	ll = dir_null_loglik(K, x, theta0, ts);
	for (i = 0; i < K; i++) {
		if (!(a[i] > 0))
			return NAN;
		A += a[i];
		m += x[i];
		s += stats_lgamma_diff_l(a[i], x[i]);
	}
	s -= stats_lgamma_diff_l(A, m);
	if (ll == -INFINITY)
		return INFINITY;
	return s - ll;
}

double
stats_dm_log_bf(int K, const double *counts, const double *theta0,
    const double *a0)
{
	double a[STATS_ARMS_MAX];
	int i;

	if (!dir_valid(K, counts, theta0))
		return NAN;
	for (i = 0; i < K; i++)
		a[i] = a0[i];
	return (double)dir_update_l(K, a, counts, theta0);
}

double
stats_dm_update(int K, double *a, const double *x, const double *theta0)
{
	long double inc;
	int i;

	int j = -1;
	long double A = 0;

	if (!dir_valid(K, x, theta0))
		return NAN;
	/* One unit in arm j, the common case of a per-unit stream:
	 * log BF += log(a_j / A) - log theta0_j (docs/methods.md sec. 3). */
	for (i = 0; i < K; i++) {
		A += a[i];
		if (x[i] == 0)
			continue;
		j = j == -1 && x[i] == 1 ? i : -2;
	}
	if (j >= 0 && a[j] > 0) {
		inc = logl(a[j] / A) - logl(theta0[j]);
		a[j] += 1;
		return (double)inc;
	}
	inc = dir_update_l(K, a, x, theta0);
	if (isnan(inc))
		return NAN;
	for (i = 0; i < K; i++)
		a[i] += x[i];
	return (double)inc;
}

/*
 * HRMS-derived concentration for K = 2 (ours, docs/methods.md sec. 3 via sec. 4):
 * the beta-binomial tuning r = rho - g h with rho = N_opt g h / D gives
 * k0 = r/(g h) = N_opt / D - 1, D = 2 log(1/alpha) + log(1 + 2 log(1/alpha)).
 * Floored like r (1e-3 g h) so a tiny plan still gives a proper prior.
 */
double
stats_dm_k0(double n_opt, double alpha)
{
	double k0;

	if (!(n_opt > 0))
		return 1e-3;
	k0 = n_opt / stats_hrms_denom(alpha) - 1;
	return k0 > 1e-3 ? k0 : 1e-3;
}

/* Pearson's chi-square goodness of fit, df = K - 1 (docs/methods.md sec. 8). */
double
stats_srm_chi2(int K, const double *counts, const double *theta0,
    double *x2)
{
	long double N = 0, ts, e, d, X = 0;
	int i;

	if (x2 != NULL)
		*x2 = NAN;
	if (!dir_valid(K, counts, theta0) || K < 2)
		return NAN;
	ts = dir_theta_sum(K, theta0);
	if (!(ts > 0))
		return NAN;
	for (i = 0; i < K; i++)
		N += counts[i];
	for (i = 0; i < K && N > 0; i++) {
		e = N * (theta0[i] / ts);
		if (e == 0) {
			if (counts[i] > 0)
				X = INFINITY;
			continue;
		}
		d = counts[i] - e;
		X += d * d / e;
	}
	if (x2 != NULL)
		*x2 = (double)X;
	return stats_chi2_sf((double)X, K - 1);
}

/*
 * Two-arm rate Bayes factor (Lindon & Malek 2022 via docs/methods.md sec. 5),
 * with theta0 and 1 - theta0 passed separately so a null share within
 * 1e-17 of 0 or 1 keeps its digits:
 *   log BF = log B(a + n_b, b + n_a) - log B(a, b) - n_b log th - n_a log th1,
 * a = k th, b = k th1. The one-sided version truncates the prior to
 * theta > th: + log I_th1(b + n_a, a + n_b) - log I_th1(b, a).
 */
static double
dir_rate_lbf(double n_a, double n_b, double th, double th1, double k,
    int one_sided)
{
	long double a = (long double)k * th, b = (long double)k * th1, v;

	v = stats_lbeta_l(a + n_b, b + n_a) - stats_lbeta_l(a, b);
	if (n_b > 0)
		v -= n_b * logl(th);
	if (n_a > 0)
		v -= n_a * logl(th1);
	if (one_sided)
		v += stats_log_ibeta_xy((double)(b + n_a), (double)(a + n_b),
		    th1, th) - stats_log_ibeta_xy((double)b, (double)a, th1, th);
	return (double)v;
}

double
stats_rate_log_bf(double n_a, double n_b, double theta0, double k,
    int one_sided)
{
	if (!(n_a >= 0) || !(n_b >= 0) || !isfinite(n_a) || !isfinite(n_b) ||
	    !(theta0 > 0) || !(theta0 < 1) || !(k > 0) || !isfinite(k))
		return NAN;
	return dir_rate_lbf(n_a, n_b, theta0, 1 - theta0, k, one_sided);
}

/* Two-sided rate log BF at logit(theta) = l, theta and 1 - theta exact. */
static double
dir_rate_at_logit(double n_a, double n_b, double k, double l)
{
	double th, th1;

	if (l >= 0) {
		th1 = 1 / (1 + exp(l));
		th = 1 / (1 + exp(-l));
	} else {
		th = 1 / (1 + exp(-l));
		th1 = 1 / (1 + exp(l));
	}
	return dir_rate_lbf(n_a, n_b, th, th1, k, 0);
}

/*
 * Edge of { l : f(l) < target } walking from l0 (inside) in direction dir:
 * double the step until outside, then bisect. Returns +-inf (as dir) when
 * the set reaches the end of the searched range.
 */
static double
dir_rate_edge(double n_a, double n_b, double k, double target, double l0,
    double dir)
{
	double in = l0, out, step = 0.25, mid;
	int i;

	for (;;) {
		out = l0 + dir * step;
		if (fabs(out) > DIR_LOGIT_MAX)
			return dir * INFINITY;
		if (!(dir_rate_at_logit(n_a, n_b, k, out) < target))
			break;
		in = out;
		step *= 2;
	}
	for (i = 0; i < DIR_BISECT_MAX && fabs(out - in) > 1e-13 *
	    (1 + fabs(in)); i++) {
		mid = 0.5 * (in + out);
		if (dir_rate_at_logit(n_a, n_b, k, mid) < target)
			in = mid;
		else
			out = mid;
	}
	return 0.5 * (in + out);
}

/*
 * Confidence set for r = rate_b / rate_a by inverting the two-sided rate
 * test over the null (docs/methods.md sec. 0, 5): theta_r = s_b r/(s_b r + s_a)
 * with exposure shares s_a, s_b, prior centred at theta_r. In logit terms
 * logit(theta_r) = log r + log(e_b / e_a), so the search runs in
 * l = logit(theta) from the point estimate log(n_b / n_a), where the
 * Bayes factor is at most 1 (a mixture of likelihood ratios against the
 * maximum-likelihood null), outward on each side.
 */
int
stats_rate_ratio_cs(double n_a, double e_a, double n_b, double e_b,
    double k, double alpha, double *lo, double *hi)
{
	double target, l0, shift, llo, lhi;

	*lo = 0;
	*hi = INFINITY;
	if (!(n_a >= 0) || !(n_b >= 0) || !isfinite(n_a) || !isfinite(n_b) ||
	    !(e_a > 0) || !(e_b > 0) || !isfinite(e_a) || !isfinite(e_b) ||
	    !(k > 0) || !isfinite(k) || !(alpha > 0) || !(alpha < 1))
		return -1;
	if (n_a == 0 && n_b == 0)
		return 0;
	target = stats_log_inv_alpha(alpha);
	shift = log(e_b) - log(e_a);
	if (n_a == 0)
		l0 = log(n_b) + 1;	/* any start where f < target */
	else if (n_b == 0)
		l0 = -log(n_a) - 1;
	else
		l0 = log(n_b) - log(n_a);
	if (!(dir_rate_at_logit(n_a, n_b, k, l0) < target)) {
		/* zero counts: walk toward the empty side to get inside */
		double d = n_a == 0 ? 1 : -1;

		while (fabs(l0) < DIR_LOGIT_MAX &&
		    !(dir_rate_at_logit(n_a, n_b, k, l0) < target))
			l0 += d * (1 + fabs(l0));
		if (!(fabs(l0) < DIR_LOGIT_MAX)) {
			if (n_a == 0)
				*lo = INFINITY;
			else
				*hi = 0;
			return 0;
		}
	}
	llo = n_b == 0 ? -INFINITY : dir_rate_edge(n_a, n_b, k, target, l0,
	    -1);
	lhi = n_a == 0 ? INFINITY : dir_rate_edge(n_a, n_b, k, target, l0,
	    1);
	*lo = llo == -INFINITY ? 0 : exp(llo - shift);
	*hi = lhi == INFINITY ? INFINITY : exp(lhi - shift);
	return 0;
}

/*
 * One-sided bounds for the rate ratio (our inversion of the one-sided
 * factor of docs/methods.md sec. 5, Lindon & Malek 2022). With theta(r) the
 * treatment's share of events under ratio r, the factor for "treatment
 * rate higher" falls as r grows and the factor for "lower" rises, so
 * each bound is one root, found by bisection in log r.
 */
#define DIR_BOUND_LOGR 40.0	/* |log r| searched from the estimate */

static double
dir_rate_one_sided(double n_a, double n_b, double e_a, double e_b, double k,
    double lr, int upper)
{
	/* theta(r) = s_b r / (s_b r + s_a), formed on the logit scale so
	 * neither theta nor 1 - theta loses digits */
	double lt = lr + log(e_b) - log(e_a);
	double th = 1 / (1 + exp(-lt)), th1 = 1 / (1 + exp(lt));

	if (!upper)
		return stats_rate_log_bf(n_a, n_b, th, k, 1);
	return stats_rate_log_bf(n_b, n_a, th1, k, 1);
}

int
stats_rate_ratio_bound(double n_a, double e_a, double n_b, double e_b,
    double k, double alpha, int upper, double *bound)
{
	double target, l0, in, out, mid, step, fin, fout, fm;
	int i, side = 0;

	*bound = upper ? INFINITY : 0;
	if (!(n_a >= 0) || !(n_b >= 0) || !isfinite(n_a) || !isfinite(n_b) ||
	    !(e_a > 0) || !(e_b > 0) || !isfinite(e_a) || !isfinite(e_b) ||
	    !(k > 0) || !isfinite(k) || !(alpha > 0) || !(alpha < 1))
		return -1;
	target = stats_log_inv_alpha(alpha);
	/* start inside the set, near the point estimate (a half event
	 * keeps empty arms finite), and walk outward until rejection */
	l0 = log((n_b + 0.5) / e_b) - log((n_a + 0.5) / e_a);
	step = upper ? 1 : -1;
	in = l0;
	if ((fin = dir_rate_one_sided(n_a, n_b, e_a, e_b, k, in, upper)) >=
	    target)
		return 0;	/* degenerate: keep the trivial bound */
	for (out = in + step;; out += step) {
		if (fabs(out - l0) > DIR_BOUND_LOGR)
			return 0;	/* never rejected: 0 or inf */
		if ((fout = dir_rate_one_sided(n_a, n_b, e_a, e_b, k, out,
		    upper)) >= target)
			break;
		in = out;
		fin = fout;
	}
	/* Illinois regula falsi on log r, as in stats_bb_bound; the ends'
	 * factors are the ones the walk just computed */
	fin -= target;
	fout -= target;
	for (i = 0; i < 200 && fabs(out - in) > 1e-13; i++) {
		mid = isfinite(fout) && isfinite(fin) ?
		    (in * fout - out * fin) / (fout - fin) : 0.5 * (in + out);
		if (!(mid > fmin(in, out) && mid < fmax(in, out)))
			mid = 0.5 * (in + out);
		fm = dir_rate_one_sided(n_a, n_b, e_a, e_b, k, mid, upper) -
		    target;
		if (fabs(fm) < 1e-12) {
			*bound = exp(mid);
			return 0;
		}
		if (fm >= 0) {
			out = mid;
			fout = fm;
			if (side == 1)
				fin *= 0.5;
			side = 1;
		} else {
			in = mid;
			fin = fm;
			if (side == -1)
				fout *= 0.5;
			side = -1;
		}
	}
	*bound = exp(0.5 * (in + out));
	return 0;
}

/* HRMS 2021 Sec. 3.5 as applied in docs/methods.md sec. 4: r = max(rho - g h, 1e-3 g h). */
double
stats_bb_r(double v_opt, double g, double h, double alpha, int one_sided)
{
	double rho = stats_nm_rho(v_opt, alpha, one_sided);
	double r = rho - g * h;

	return r > 1e-3 * g * h ? r : 1e-3 * g * h;
}

/*
 * HRMS 2021 Props. 6 (two-sided) and 7 (one-sided), docs/methods.md sec. 4:
 *   log m = (v/(gh)) log(g+h) - ((v+hs)/(h(g+h))) log g
 *           - ((v-gs)/(g(g+h))) log h + log B_x(A, B) - log B_x(A0, B0),
 *   A = (r + v - g s)/(g (g+h)), B = (r + v + h s)/(h (g+h)),
 *   A0 = r/(g (g+h)), B0 = r/(h (g+h)),
 * x = 1 (two-sided) or h/(g+h) (one-sided, upper). s lies in
 * [-v/h, v/g] for increments in {-g, +h}; beyond that the data are
 * impossible under the null and the evidence is infinite.
 */
/*
 * The terms of log m that depend on (g, h, r) alone. A bound search
 * (stats_bb_bound, quant_bound) calls stats_bb_logm a dozen times with
 * only s moving, so the last set is kept, one per thread; a hit gives
 * the very values the computation would (same inputs, same operations),
 * so log m is the same to the bit either way.
 */
struct bb_prior {
	double		g, h, r;
	int		one_sided, set;
	long double	gh, A0, B0, lgh, lg, lh, lb0;
	double		x, y, ib0;
};

static const struct bb_prior *
bb_prior(double g, double h, double r, int one_sided)
{
	static _Thread_local struct bb_prior p;

	if (p.set && p.g == g && p.h == h && p.r == r &&
	    p.one_sided == one_sided)
		return &p;
	p.g = g;
	p.h = h;
	p.r = r;
	p.one_sided = one_sided;
	p.gh = (long double)g + h;
	p.A0 = r / (g * p.gh);
	p.B0 = r / (h * p.gh);
	p.lgh = logl(p.gh);
	p.lg = logl(g);
	p.lh = logl(h);
	p.lb0 = stats_lbeta_l(p.A0, p.B0);
	if (one_sided) {
		p.x = (double)(h / p.gh);
		p.y = (double)(g / p.gh);
		p.ib0 = stats_log_ibeta_xy((double)p.A0, (double)p.B0, p.x,
		    p.y);
	}
	p.set = 1;
	return &p;
}

double
stats_bb_logm(double s, double v, double g, double h, double r,
    int one_sided)
{
	const struct bb_prior *p;
	long double gh, A, B, t;

	if (!(g > 0) || !(h > 0) || !(r > 0) || !(v >= 0) || isnan(s))
		return NAN;
	if (v == 0)
		return 0;
	gh = (long double)g + h;
	A = (r + v - (long double)g * s) / (g * gh);
	B = (r + v + (long double)h * s) / (h * gh);
	if (!(A > 0) || !(B > 0))
		return INFINITY;
	p = bb_prior(g, h, r, one_sided);
	t = (long double)v / ((long double)g * h) * p->lgh -
	    (v + (long double)h * s) / (h * gh) * p->lg -
	    (v - (long double)g * s) / (g * gh) * p->lh +
	    stats_lbeta_l(A, B) - p->lb0;
	if (one_sided)
		t += stats_log_ibeta_xy((double)A, (double)B, p->x, p->y) -
		    p->ib0;
	return (double)t;
}

/*
 * Bound: the s in [0, v/g] where log m crosses log(1/alpha) (docs/methods.md
 * sec. 9); v/g, the largest possible sum, when it never does. log m is
 * smooth and increasing in s there, so the root is bracketed and found by
 * the Illinois variant of regula falsi (Dowell & Jarratt 1971), which
 * converges superlinearly; a step that leaves the bracket, or an infinite
 * end value, falls back to bisection. Bounds are recomputed for every
 * confidence sequence, so the iteration count matters.
 */
double
stats_bb_bound(double v, double g, double h, double r, double alpha,
    int one_sided)
{
	double lo = 0, hi, mid, flo, fhi, fm, target;
	int i, side = 0;

	if (!(g > 0) || !(h > 0) || !(r > 0) || !(v >= 0))
		return NAN;
	target = stats_log_inv_alpha(alpha);
	hi = v / g;
	if (v == 0 || (fhi = stats_bb_logm(hi, v, g, h, r, one_sided) -
	    target) < 0)
		return hi;
	if (!((flo = stats_bb_logm(0, v, g, h, r, one_sided) - target) < 0))
		return 0;
	for (i = 0; i < DIR_BISECT_MAX && hi - lo > 1e-14 * hi; i++) {
		mid = isfinite(fhi) ? (lo * fhi - hi * flo) / (fhi - flo) :
		    0.5 * (lo + hi);
		if (!(mid > lo && mid < hi))
			mid = 0.5 * (lo + hi);
		fm = stats_bb_logm(mid, v, g, h, r, one_sided) - target;
		if (fabs(fm) < 1e-13)
			return mid;
		if (fm < 0) {
			lo = mid;
			flo = fm;
			if (side == -1)
				fhi *= 0.5;
			side = -1;
		} else {
			hi = mid;
			fhi = fm;
			if (side == 1)
				flo *= 0.5;
			side = 1;
		}
	}
	return 0.5 * (lo + hi);
}

/*
 * Beta-binomial Bayes factor for k events in n trials against success
 * probability p, prior Beta(k0 p, k0 (1 - p)); equals the two-sided
 * mixture with g = p, h = 1 - p, r = k0 p (1 - p) (docs/methods.md sec. 4).
 */
static double
dir_bernoulli_lbf(double k, double n, double p, double k0)
{
	long double q = 1 - (long double)p, v;

	v = stats_lbeta_l(k0 * p + k, k0 * q + (n - k)) -
	    stats_lbeta_l(k0 * p, k0 * q);
	if (k > 0)
		v -= k * logl(p);
	if (n - k > 0)
		v -= (n - k) * log1pl(-(long double)p);
	return (double)v;
}

/*
 * Bernoulli-mean CS (docs/methods.md sec. 4; HRMS 2021 Prop. 6): the p with
 * two-sided log m(k - n p, n p(1-p)) < log(1/alpha), tuned at
 * v_opt = t_opt p (1-p). Then k0 = r/(p(1-p)) = max(t_opt/D - 1, 1e-3)
 * does not depend on p, so each side is a bisection on one Bayes factor.
 */
int
stats_bernoulli_cs(double k, double n, double t_opt, double alpha,
    double *lo, double *hi)
{
	double k0, target, ph, a, b, mid;
	int i;

	*lo = 0;
	*hi = 1;
	if (!(n >= 0) || !(k >= 0) || !(k <= n) || !isfinite(n) ||
	    !(t_opt > 0) || !(alpha > 0) || !(alpha < 1))
		return -1;
	if (n == 0)
		return 0;
	k0 = t_opt / stats_hrms_denom(alpha) - 1;
	if (k0 < 1e-3)
		k0 = 1e-3;
	target = stats_log_inv_alpha(alpha);
	ph = k / n;
	if (k > 0 && !(dir_bernoulli_lbf(k, n, DBL_MIN, k0) < target)) {
		a = DBL_MIN;	/* outside */
		b = ph;		/* inside */
		for (i = 0; i < DIR_BISECT_MAX && b - a > 1e-15 * b; i++) {
			mid = 0.5 * (a + b);
			if (dir_bernoulli_lbf(k, n, mid, k0) < target)
				b = mid;
			else
				a = mid;
		}
		*lo = 0.5 * (a + b);
	}
	if (k < n && !(dir_bernoulli_lbf(k, n, 1 - DBL_EPSILON / 2, k0) <
	    target)) {
		a = ph;
		b = 1 - DBL_EPSILON / 2;
		for (i = 0; i < DIR_BISECT_MAX && b - a > 1e-15; i++) {
			mid = 0.5 * (a + b);
			if (dir_bernoulli_lbf(k, n, mid, k0) < target)
				a = mid;
			else
				b = mid;
		}
		*hi = 0.5 * (a + b);
	}
	return 0;
}
