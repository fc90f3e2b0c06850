/*
 * stats_int.h: helpers shared by the statistics files and nothing else.
 * Long double is used where a sum of terms of size ~N log N must cancel
 * down to a log Bayes factor of size ~1 (N up to 10^12 records).
 */
#ifndef STOPCOCK_STATS_INT_H
#define STOPCOCK_STATS_INT_H

/* log B(a, b) in long double, accurate for arguments up to ~1e15. */
long double	stats_lbeta_l(long double a, long double b);
/* The same in double: faster, absolute error ~1e-16 (a + b). */
double		stats_lbeta_d(double a, double b);
/* lgamma(x + d) - lgamma(x) in long double (x > 0, d >= 0). */
long double	stats_lgamma_diff_l(long double x, long double d);
/*
 * log I_x(a, b) with y = 1 - x supplied by the caller, so tails near
 * x = 1 keep their precision.
 */
double		stats_log_ibeta_xy(double a, double b, double x, double y);
/* log Phi(z) + z^2 / 2 without cancellation for z << 0. */
double		stats_log_ndtr_half_sq(double z);
/* log(1/alpha) with alpha clamped into (0, 1). */
double		stats_log_inv_alpha(double alpha);
/* The HRMS tuning denominator 2 l + log(1 + 2 l), l = log(1/alpha). */
double		stats_hrms_denom(double alpha);

#endif
