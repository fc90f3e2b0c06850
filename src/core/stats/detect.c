/*
 * detect.c: sequential change detection. A test started at time zero
 * dilutes a change that begins late by all the healthy data before it;
 * a change detector restarts its evidence whenever the evidence says
 * "nothing yet", so its delay after a change does not grow with the
 * history. Here: Page's CUSUM (Page 1954) for one-sided Gaussian block
 * scores, run for a grid of excess sizes lambda and mixed with fixed
 * weights. Each per-lambda CUSUM exp(W) is an e-CUSUM, which lies below
 * the e-SR sum over start times of the likelihood ratios since each start
 * (Shin, Ramdas & Rinaldo 2023, "E-detectors: a nonparametric framework
 * for sequential change detection"); a weighted average of e-SR
 * statistics is an e-SR statistic of the mixed likelihood ratios, so the
 * mixture of the CUSUMs is below an e-detector and its alarm time N at
 * threshold c has E[N] >= c blocks under no change.
 *
 * Block scores: X = d I and information I = 1 / V for a block whose
 * excess beyond the margin is d with variance V; the Gaussian likelihood
 * ratio of excess lambda against 0 is exp(lambda X - lambda^2 I / 2).
 */
#include <math.h>
#include <string.h>

#include "stopcock/stats.h"

void
stats_detect_init(struct stats_detect *dt, double lambda_min,
    double lambda_max, int k)
{
	int i;

	memset(dt, 0, sizeof *dt);
	if (k < 1)
		k = 1;
	if (k > STATS_DETECT_GRID)
		k = STATS_DETECT_GRID;
	if (!(lambda_min > 0) || !isfinite(lambda_min))
		lambda_min = 1e-300;
	if (!(lambda_max >= lambda_min) || !isfinite(lambda_max))
		lambda_max = lambda_min;
	dt->k = k;
	for (i = 0; i < k; i++) {
		/* log-spaced: each grid point covers a factor of the excess */
		dt->lambda[i] = k == 1 ? lambda_min : lambda_min *
		    pow(lambda_max / lambda_min, (double)i / (k - 1));
		dt->log_w[i] = -log((double)k);
		dt->log_m[i] = -INFINITY;	/* M = 0: no run yet */
		dt->start[i] = NAN;
	}
}

/* Page's recursion in log form: W = l + max(W_prev, 0). */
double
stats_cusum_update(double w, double l)
{
	return l + (w > 0 ? w : 0);
}

/* Shiryaev-Roberts in log form: log R = l + log(1 + R_prev). */
double
stats_sr_update(double log_r, double l)
{
	double sp = log_r > 0 ? log_r + log1p(exp(-log_r)) : log1p(exp(log_r));

	return l + sp;
}

double
stats_detect_update(struct stats_detect *dt, double X, double I, double t)
{
	double l;
	int i;

	if (!(I > 0) || !isfinite(I) || !isfinite(X))
		return stats_detect_log_m(dt);
	for (i = 0; i < dt->k; i++) {
		l = dt->lambda[i] * X - 0.5 * dt->lambda[i] * dt->lambda[i] * I;
		/* a run restarts when the statistic had fallen to <= 0 */
		if (!(dt->log_m[i] > 0))
			dt->start[i] = t;
		dt->log_m[i] = stats_cusum_update(dt->log_m[i], l);
	}
	dt->blocks++;
	return stats_detect_log_m(dt);
}

double
stats_detect_log_m(const struct stats_detect *dt)
{
	double m = -INFINITY, s = 0, v;
	int i;

	for (i = 0; i < dt->k; i++) {
		v = dt->log_w[i] + dt->log_m[i];
		if (v > m)
			m = v;
	}
	if (m == -INFINITY)
		return m;
	for (i = 0; i < dt->k; i++)
		s += exp(dt->log_w[i] + dt->log_m[i] - m);
	return m + log(s);
}

double
stats_detect_change_start(const struct stats_detect *dt)
{
	double best = -INFINITY;
	int i, arg = -1;

	for (i = 0; i < dt->k; i++)
		if (dt->log_w[i] + dt->log_m[i] > best) {
			best = dt->log_w[i] + dt->log_m[i];
			arg = i;
		}
	return arg < 0 ? NAN : dt->start[arg];
}

/*
 * Budget form "average run length": series detectors each alarming at
 * log(series * arl) average to one e-detector at threshold arl, so the
 * experiment's mean time to a false alarm is at least arl blocks.
 */
double
stats_detect_threshold(double arl_blocks, double series)
{
	if (!(arl_blocks >= 1) || !(series >= 1))
		return NAN;
	return log(series) + log(arl_blocks);
}
