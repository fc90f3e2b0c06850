/*
 * mixture.c: normal-mixture test martingales. The mSPRT of Johari, Pekelis
 * & Walsh (2022) drives the guardrails on means and proportions; the HRMS
 * normal-mixture boundaries (Howard, Ramdas, McAuliffe & Sekhon 2021)
 * give its one-sided variant and the tuning rule that picks the mixing
 * variance from a planned sample size. Inputs are sufficient statistics
 * (estimate, variance, intrinsic time); output is log evidence or a
 * boundary. Formulas: docs/methods.md sec. 1 and 2.
 */
#include <math.h>

#include "stopcock/stats.h"
#include "stats_int.h"

/* Bisection steps for boundaries without closed form: 2^-200 of range. */
#define MIX_BISECT_MAX	200

/*
 * HRMS 2021 Sec. 3.5: rho = v_opt / (2 log(1/alpha) + log(1 + 2 log(1/alpha)))
 * makes the two-sided boundary tightest at v_opt; the one-sided mixture
 * uses the same rule with alpha -> 2 alpha (docs/methods.md sec. 2).
 */
double
stats_nm_rho(double v_opt, double alpha, int one_sided)
{
	if (one_sided)
		alpha *= 2;
	return v_opt / stats_hrms_denom(alpha);
}

/* HRMS 2021 Prop. 4: log m = 0.5 log(rho/(v+rho)) + s^2 / (2 (v+rho)). */
double
stats_nm_logm(double s, double v, double rho)
{
	if (!(v > 0) || !(rho > 0))
		return 0;
	return -0.5 * log1p(v / rho) + s * s / (2 * (v + rho));
}

/*
 * HRMS 2021 Prop. 5 (half-normal mixture):
 * log m1 = 0.5 log(4 rho/(v+rho)) + s^2/(2 (v+rho)) + log Phi(s/sqrt(v+rho)).
 */
double
stats_nm_logm1(double s, double v, double rho)
{
	if (!(v > 0) || !(rho > 0))
		return 0;
	return M_LN2 - 0.5 * log1p(v / rho) + s * s / (2 * (v + rho)) +
	    stats_log_ndtr(s / sqrt(v + rho));
}

/* HRMS 2021 Prop. 4: u(v) = sqrt((v + rho)(log(1 + v/rho) + 2 log(1/alpha))). */
double
stats_nm_bound(double v, double rho, double alpha)
{
	if (!(v >= 0) || !(rho > 0))
		return NAN;
	return sqrt((v + rho) * (log1p(v / rho) +
	    2 * stats_log_inv_alpha(alpha)));
}

/*
 * One-sided boundary: log m1(s, v) = log(1/alpha) has no closed form
 * (docs/methods.md sec. 2); bisect. log m1 is increasing in s, negative at
 * s = 0, and at the two-sided bound u it exceeds log(1/alpha) because
 * log m1(u) >= log m(u) + log 2 + log Phi(sqrt(2 log(1/alpha))).
 */
double
stats_nm_bound1(double v, double rho, double alpha)
{
	double lo = 0, hi, mid, target = stats_log_inv_alpha(alpha);
	int i;

	hi = stats_nm_bound(v, rho, alpha);
	if (isnan(hi))
		return NAN;
	for (i = 0; i < MIX_BISECT_MAX && hi - lo > 1e-15 * hi; i++) {
		mid = 0.5 * (lo + hi);
		if (stats_nm_logm1(mid, v, rho) < target)
			lo = mid;
		else
			hi = mid;
	}
	return 0.5 * (lo + hi);
}

/*
 * Johari, Pekelis & Walsh 2022, generic form (docs/methods.md sec. 1):
 * log Lambda = -0.5 log1p(tau^2/V) + tau^2 (est - theta0)^2 / (2 V (V + tau^2)),
 * the second term written as d^2/(2V) / (1 + V/tau^2) so a tiny V cannot
 * underflow V (V + tau^2) to zero.
 */
double
stats_msprt_log_lr(double est, double theta0, double V, double tau2)
{
	double d;

	if (!(V > 0) || !isfinite(V) || !(tau2 > 0) || !isfinite(tau2) ||
	    !isfinite(est) || !isfinite(theta0))
		return 0;
	d = est - theta0;
	return -0.5 * log1p(tau2 / V) + d * d / (2 * V) / (1 + V / tau2);
}

/*
 * JPW 2022 inverted (our derivation, docs/methods.md sec. 1):
 * hw = sqrt(V (V + tau^2)/tau^2 * log((V + tau^2)/(V alpha^2))).
 */
double
stats_msprt_halfwidth(double V, double tau2, double alpha)
{
	if (!(V > 0) || !isfinite(V) || !(tau2 > 0))
		return INFINITY;
	return sqrt(V * (1 + V / tau2) * (log1p(tau2 / V) +
	    2 * stats_log_inv_alpha(alpha)));
}

/*
 * Rule (a) of docs/methods.md sec. 1: tau^2 = V_unit (2 log(1/alpha) +
 * log(1 + 2 log(1/alpha))) / n_opt, the HRMS tuning mapped through
 * rho = V_unit^2 / tau^2 with v_opt = n_opt V_unit.
 */
double
stats_msprt_tau2(double v_unit, double alpha, double n_opt)
{
	if (!(v_unit > 0) || !(n_opt > 0))
		return NAN;
	return v_unit * stats_hrms_denom(alpha) / n_opt;
}

/*
 * One-sided harm evidence with a margin: the half-normal mixture of the
 * Gaussian likelihood ratio exp(lambda X - lambda^2 I / 2), X = d / V,
 * I = 1 / V, over lambda >= 0 with density 2 phi(lambda / tau) / tau
 * (Howard, Ramdas, McAuliffe & Sekhon 2021, Prop. 5, in the mSPRT form of
 * Johari, Pekelis & Walsh 2022). Integrating gives
 *
 *   log E = log 2 - 0.5 log1p(tau^2 / V) + log Phi(z) + z^2 / 2,
 *   z = tau d / sqrt(V (V + tau^2)).
 *
 * For a true excess delta <= 0 every component has expectation
 * exp(lambda delta I) <= 1, so E is a supermartingale on the whole null.
 * Phi and the exponential are never formed apart: log Phi(z) + z^2/2 is
 * taken from the normal hazard for z << 0, where each term alone is
 * ~1000 and their sum ~ -log(-z) (stats_log_ndtr_half_sq).
 */
double
stats_harm_log_e(double d, double V, double tau2)
{
	double z;

	if (!(V > 0) || !isfinite(V) || !(tau2 > 0) || !isfinite(tau2) ||
	    !isfinite(d))
		return 0;
	z = d * sqrt(tau2) / sqrt(V) / sqrt(V + tau2);
	return M_LN2 - 0.5 * log1p(tau2 / V) + stats_log_ndtr_half_sq(z);
}

/* log E grows with d: bisect on [0, 2^j sqrt V], doubling until above. */
double
stats_harm_boundary(double V, double tau2, double alpha)
{
	double target = stats_log_inv_alpha(alpha), lo = 0, hi, mid;
	int i;

	if (!(V > 0) || !isfinite(V) || !(tau2 > 0))
		return INFINITY;
	hi = sqrt(V);
	for (i = 0; i < 200 && stats_harm_log_e(hi, V, tau2) < target; i++)
		hi *= 2;
	for (i = 0; i < MIX_BISECT_MAX && hi - lo > 1e-15 * hi; i++) {
		mid = 0.5 * (lo + hi);
		if (stats_harm_log_e(mid, V, tau2) < target)
			lo = mid;
		else
			hi = mid;
	}
	return 0.5 * (lo + hi);
}
