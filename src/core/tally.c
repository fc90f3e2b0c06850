/*
 * tally.c: per-series sufficient statistics (see tally.h). These are the
 * only numbers the tests read for mean and proportion guardrails; the
 * quantile guardrails read the sketch kept beside them.
 */
#include <math.h>

#include "stopcock/tally.h"

void
tally_moments_add(struct tally_moments *t, double x)
{
	double d;

	/* Welford (1962): one pass, no catastrophic cancellation. */
	t->n++;
	d = x - t->mean;
	t->mean += d / (double)t->n;
	t->m2 += d * (x - t->mean);
}

double
tally_moments_var(const struct tally_moments *t)
{
	if (t->n < 2)
		return 0;
	return t->m2 / (double)(t->n - 1);
}

void
tally_ratio_add(struct tally_ratio *t, double k, double n)
{
	long double lk = k, ln = n;

	t->records++;
	t->k += lk;
	t->n += ln;
	t->kk += lk * lk;
	t->kn += lk * ln;
	t->nn += ln * ln;
}

double
tally_ratio_rate(const struct tally_ratio *t)
{
	if (t->n <= 0)
		return NAN;
	return (double)(t->k / t->n);
}

double
tally_ratio_var(const struct tally_ratio *t)
{
	long double r, ss;

	if (t->records < 2 || t->n <= 0)
		return 0;
	/*
	 * Delta method for a ratio of sums (e.g. Deng, Knoblich & Lu 2018,
	 * "Applying the delta method in metric analytics"): the residuals
	 * K_i - r N_i carry the within-unit clustering. Expanded from the
	 * stored sums; long double keeps the cancellation harmless.
	 */
	r = t->k / t->n;
	ss = t->kk - 2 * r * t->kn + r * r * t->nn;
	if (ss < 0)
		ss = 0;
	return (double)(ss / (t->n * t->n) *
	    ((long double)t->records / (long double)(t->records - 1)));
}
