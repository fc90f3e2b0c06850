/*
 * variance.c: variances that do not collapse where plug-in estimates do.
 * Two problems of real traffic meet here. A small arm with no event yet
 * has a plug-in binomial variance of zero, which makes any difference look
 * certain; the fix is the variance under the null, from the proportions
 * that maximise the likelihood subject to the null difference
 * (Farrington & Manning 1990). And records of one randomisation unit
 * (a user's requests, a device's sessions) are not independent; the fix is
 * the random-group variance (Wolter 2007, ch. 2): units are hashed into G
 * groups, each group keeps its totals, and the spread of the group totals
 * around the ratio gives the ratio's variance whatever the dependence
 * within units. Estimated from few groups, that variance is itself noisy;
 * kappa inflates it so the test's tail matches a t distribution's.
 * docs/methods.md restates each formula with its check values.
 */
#include <math.h>

#include <gsl/gsl_cdf.h>

#include "stopcock/stats.h"
#include "stats_int.h"

/* Halvings of the score's bracket: 2^-200 of (0, 1) is below any ulp. */
#define VAR_BISECT 200

/* Score of the binomial log likelihood along p_T = q + D (F&M 1990).
 * Terms whose count is zero are dropped: 0 log 0 = 0. */
static double
var_score(double q, double D, double x_t, double n_t, double x_c,
    double n_c)
{
	double g = 0;

	if (x_t > 0)
		g += x_t / (q + D);
	if (n_t - x_t > 0)
		g -= (n_t - x_t) / (1 - q - D);
	if (x_c > 0)
		g += x_c / q;
	if (n_c - x_c > 0)
		g -= (n_c - x_c) / (1 - q);
	return g;
}

/*
 * Farrington & Manning 1990, method 3: the restricted MLE. The score is
 * strictly decreasing in q on (max(0, -D), min(1, 1 - D)), so bisection
 * finds its root, or the end of the bracket where the maximum sits when
 * the score keeps one sign (no events and D >= 0, say). The paper's closed
 * form (a cubic through acos) needs clamping near its ends and agrees only
 * to ~1e-12; bisection is exact to the last bit and cheap enough at
 * evaluation time.
 */
int
stats_prop_null(double x_t, double n_t, double x_c, double n_c, double D,
    double *p_t, double *p_c)
{
	double lo, hi, mid;
	int i;

	if (!(n_t >= 0) || !(n_c >= 0) || n_t + n_c <= 0 || !isfinite(D) ||
	    fabs(D) >= 1)
		return -1;
	/* no margin: the restricted MLE is the pooled proportion */
	if (D == 0) {
		*p_t = *p_c = (x_t + x_c) / (n_t + n_c);
		return 0;
	}
	lo = D < 0 ? -D : 0;
	hi = D > 0 ? 1 - D : 1;
	for (i = 0; i < VAR_BISECT && hi > lo; i++) {
		mid = 0.5 * (lo + hi);
		if (mid <= lo || mid >= hi)
			break;
		if (var_score(mid, D, x_t, n_t, x_c, n_c) > 0)
			lo = mid;
		else
			hi = mid;
	}
	mid = 0.5 * (lo + hi);
	*p_c = mid;
	*p_t = fmin(1, fmax(0, mid + D));
	return 0;
}

/*
 * Wolter 2007, ch. 2, the random-group variance, here of the linearised
 * ratio: with R = S / N and z_g = S_g - R N_g (the z_g sum to zero),
 * v(R) = G'/(G' - 1) sum z_g^2 / N^2 over the G' non-empty groups. With
 * one unit per group this is the unit-level sandwich variance. Two passes
 * (R first): the one-pass sum S^2 - 2 R S N + R^2 N^2 cancels badly for
 * latencies with a small spread.
 */
static inline double
group_var(int G, const double *S, const double *N, int stride, double *R)
{
	double s = 0, n = 0, zz = 0, z, r;
	int g, used = 0;

	for (g = 0; g < G; g++, S += stride, N += stride) {
		s += *S;
		n += *N;
		used += *N != 0 || *S != 0;
	}
	if (!(n > 0) || used < 2) {
		*R = n > 0 ? s / n : NAN;
		return NAN;
	}
	r = s / n;
	for (S -= (size_t)G * stride, N -= (size_t)G * stride, g = 0; g < G;
	    g++, S += stride, N += stride) {
		z = *S - r * *N;
		zz += z * z;
	}
	*R = r;
	return (double)used / (used - 1) * zz / (n * n);
}

double
stats_group_var(int G, const double *S, const double *N, double *R)
{
	return group_var(G, S, N, 1, R);
}

double
stats_group_var_strided(int G, const double *S, const double *N,
    int stride, double *R)
{
	/* the engine's pairs: a constant stride the loops are built for */
	if (stride == 2)
		return group_var(G, S, N, 2, R);
	return group_var(G, S, N, stride, R);
}

/* Inflate a variance from nu + 1 groups so the normal tail at q is the
 * t_nu tail at q: kappa = (t_nu^-1(1 - q) / z_{1-q})^2. */
double
stats_group_kappa(double nu, double q)
{
	double t, z;

	if (!(nu >= 1) || !(q > 0) || !(q < 0.5))
		return NAN;
	t = gsl_cdf_tdist_Qinv(q, nu);
	z = gsl_cdf_ugaussian_Qinv(q);
	return (t / z) * (t / z);
}
