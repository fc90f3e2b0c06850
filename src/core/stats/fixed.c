/*
 * fixed.c: one-look, fixed-horizon figures. They are shown beside the
 * sequential results for orientation (a classic z-test, a planned sample
 * size) and are valid only for a single analysis at a pre-set n; every
 * caller labels them so (docs/methods.md sec. 8).
 */
#include <math.h>

#include "stopcock/stats.h"

/*
 * Pooled two-proportion z-test (docs/methods.md sec. 8):
 * p = (x_a + x_b)/(n_a + n_b), SE = sqrt(p(1-p)(1/n_a + 1/n_b)),
 * z = (x_b/n_b - x_a/n_a)/SE, two-sided P = 2(1 - Phi(|z|)).
 * No variation (pooled p in {0, 1}) or an empty arm gives z = 0, P = 1.
 */
double
stats_ztest_prop(double x_a, double n_a, double x_b, double n_b, double *z)
{
	double p, se, zz;

	if (z != NULL)
		*z = NAN;
	if (!(n_a >= 0) || !(n_b >= 0) || !(x_a >= 0) || !(x_b >= 0) ||
	    x_a > n_a || x_b > n_b || !isfinite(n_a) || !isfinite(n_b))
		return NAN;
	if (n_a == 0 || n_b == 0) {
		if (z != NULL)
			*z = 0;
		return 1;
	}
	p = (x_a + x_b) / (n_a + n_b);
	se = sqrt(p * (1 - p) * (1 / n_a + 1 / n_b));
	if (!(se > 0)) {
		if (z != NULL)
			*z = 0;
		return 1;
	}
	zz = (x_b / n_b - x_a / n_a) / se;
	if (z != NULL)
		*z = zz;
	return erfc(fabs(zz) / M_SQRT2);
}

/*
 * Wald test (e.g. Casella & Berger, Statistical Inference, 2nd ed. 2002,
 * sec. 10.3.2): z = est / sqrt(var), two-sided P = 2(1 - Phi(|z|)).
 * A variance that is not positive (no information yet) or a non-finite
 * estimate gives z = 0, P = 1.
 */
double
stats_ztest(double est, double var, double *z)
{
	double zz;

	if (!(var > 0) || !isfinite(var) || !isfinite(est)) {
		if (z != NULL)
			*z = 0;
		return 1;
	}
	zz = est / sqrt(var);
	if (z != NULL)
		*z = zz;
	return erfc(fabs(zz) / M_SQRT2);
}

/*
 * Normal-approximation sample size per arm for a two-sided level-alpha
 * test with the given power (e.g. Chow, Shao & Wang, Sample Size
 * Calculations in Clinical Research, 2008, sec. 3.2):
 * n = (z_{1-alpha/2} + z_power)^2 (var_a + var_b) / delta^2.
 */
double
stats_fixed_n(double delta, double var_a, double var_b, double alpha,
    double power)
{
	double za, zb;

	if (!(var_a >= 0) || !(var_b >= 0) || !(alpha > 0) || !(alpha < 1) ||
	    !(power > 0) || !(power < 1) || isnan(delta))
		return NAN;
	if (delta == 0)
		return INFINITY;
	za = stats_norm_ppf(1 - alpha / 2);
	zb = stats_norm_ppf(power);
	return (za + zb) * (za + zb) * (var_a + var_b) / (delta * delta);
}
