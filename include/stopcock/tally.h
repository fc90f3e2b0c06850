/*
 * tally.h: sufficient statistics for one (experiment, epoch, arm, metric)
 * series. Plain structs updated in place; no allocation. Means use
 * Welford's update (stable at 10^9 values); ratio metrics keep the sums
 * the delta method needs, so the variance of sum K / sum N accounts for
 * events clustered within a unit (a user's requests) instead of treating
 * every trial as independent.
 */
#ifndef STOPCOCK_TALLY_H
#define STOPCOCK_TALLY_H

#include <stdint.h>

struct tally_moments {
	uint64_t	n;
	double		mean;
	double		m2;	/* sum of squared deviations from the mean */
};

struct tally_ratio {
	uint64_t	records;
	long double	k, n;		/* sums of K and N */
	long double	kk, kn, nn;	/* sums of K^2, K N, N^2 */
};

void	tally_moments_add(struct tally_moments *, double x);
/* Unbiased sample variance; 0 with fewer than two values. */
double	tally_moments_var(const struct tally_moments *);

void	tally_ratio_add(struct tally_ratio *, double k, double n);
/* sum K / sum N; NAN when sum N is 0. */
double	tally_ratio_rate(const struct tally_ratio *);
/*
 * Delta-method variance of the ratio estimate:
 * sum_i (K_i - r N_i)^2 / (sum N)^2, times records/(records-1) for the
 * small-sample correction. 0 with fewer than two records.
 */
double	tally_ratio_var(const struct tally_ratio *);

#endif
