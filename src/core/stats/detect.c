/*
 * detect.c: sequential change detection. A test started at time zero
 * dilutes a change that begins late by all the healthy data before it;
 * a change detector restarts its evidence whenever the evidence says
 * "nothing yet", so its delay after a change does not grow with the
 * history. Here: Page's CUSUM (Page 1954) for one-sided Gaussian block
 * scores, run for a grid of excess sizes lambda and mixed with fixed
 * weights; constant memory (STATS_DETECT_GRID doubles of each kind) and
 * O(k) work per block.
 *
 * Why the alarm is controlled. For one lambda, exp of the CUSUM is
 * M_b = L_b max(M_{b-1}, 1) from M_0 = 0, i.e. the largest over start
 * times j of the likelihood ratio of the blocks j..b: an e-CUSUM, which is
 * below the e-SR sum over j of the same ratios (Shin, Ramdas & Rinaldo
 * 2023, "E-detectors: a nonparametric framework for sequential change
 * detection"). A weighted sum over lambda of e-SR statistics with weights
 * summing to one is the e-SR statistic of the mixed ratios, each a
 * nonnegative supermartingale under "no excess" (every lambda >= 0), so
 * the mixture of CUSUMs is below an e-detector and its alarm time N at
 * threshold c has E[N] >= c blocks under no change; stopping at any
 * bounded time T gives also P(N <= T) <= T / c (optional stopping of the
 * e-SR sum, whose mean after n blocks is at most n).
 *
 * Block scores: X = d I and information I = 1 / V for a block whose
 * excess beyond the margin is d with variance V; the Gaussian likelihood
 * ratio of excess lambda against 0 is exp(lambda X - lambda^2 I / 2), a
 * supermartingale factor whenever the true excess is <= 0. The change
 * time estimate is the start of the run of the grid point that weighs
 * most in the mixture, as Page's rule reports the block after the last
 * time the statistic was at zero.
 */
#include <math.h>
#include <string.h>

#include "stopcock/stats.h"

int
stats_detect_init(struct stats_detect *dt, double lambda_min,
    double lambda_max, int k)
{
	int i;

	memset(dt, 0, sizeof *dt);
	if (k < 1 || k > STATS_DETECT_GRID || !(lambda_min > 0) ||
	    !(lambda_max >= lambda_min) || !isfinite(lambda_max))
		return -1;	/* k = 0: an inert detector, log M = -inf */
	dt->k = k;
	for (i = 0; i < k; i++) {
		/* log-spaced: each point covers the same factor of excess */
		dt->lambda[i] = k == 1 ? lambda_min : lambda_min *
		    pow(lambda_max / lambda_min, (double)i / (k - 1));
		dt->log_w[i] = -log((double)k);
	}
	stats_detect_reset(dt);
	return 0;
}

void
stats_detect_reset(struct stats_detect *dt)
{
	int i;

	for (i = 0; i < STATS_DETECT_GRID; i++) {
		dt->log_m[i] = -INFINITY;	/* M = 0: no run yet */
		dt->start[i] = NAN;
	}
	dt->blocks = 0;
}

/* Page's recursion in log form: log M = l + max(log M_prev, 0). */
double
stats_cusum_update(double w, double l)
{
	return l + (w > 0 ? w : 0);
}

/* Shiryaev-Roberts in log form: log R = l + log(1 + R_prev). */
double
stats_sr_update(double log_r, double l)
{
	double sp;

	/* softplus without overflow for large log R */
	sp = log_r > 0 ? log_r + log1p(exp(-log_r)) : log1p(exp(log_r));
	return l + sp;
}

double
stats_detect_update(struct stats_detect *dt, double X, double I, double t)
{
	double l[STATS_DETECT_GRID];
	int i;

	if (!(I > 0) || !isfinite(I) || !isfinite(X))
		return stats_detect_log_m(dt);
	/* all or nothing: a block whose log ratio overflows for some lambda
	 * (only absurd scores) is skipped rather than half applied */
	for (i = 0; i < dt->k; i++) {
		l[i] = dt->lambda[i] * X - 0.5 * dt->lambda[i] *
		    dt->lambda[i] * I;
		if (!isfinite(l[i]))
			return stats_detect_log_m(dt);
	}
	for (i = 0; i < dt->k; i++) {
		/* a run restarts when its statistic had fallen to <= 0 (or
		 * never began): ties go to the later start, as in Page 1954 */
		if (!(dt->log_m[i] > 0))
			dt->start[i] = t;
		dt->log_m[i] = stats_cusum_update(dt->log_m[i], l[i]);
	}
	if (dt->k > 0)
		dt->blocks++;
	return stats_detect_log_m(dt);
}

/* logsumexp_k(log w_k + log M_k); -inf before the first block. */
double
stats_detect_log_m(const struct stats_detect *dt)
{
	double m = -INFINITY, s = 0;
	int i;

	for (i = 0; i < dt->k; i++)
		if (dt->log_w[i] + dt->log_m[i] > m)
			m = dt->log_w[i] + dt->log_m[i];
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

int
stats_detect_check(const struct stats_detect *dt)
{
	double top = -INFINITY, s = 0;
	int i;

	if (dt->k == 0)
		return 0;
	if (dt->k < 0 || dt->k > STATS_DETECT_GRID || !(dt->blocks >= 0) ||
	    !isfinite(dt->blocks))
		return -1;
	for (i = 0; i < dt->k; i++) {
		if (!(dt->lambda[i] > 0) || !isfinite(dt->lambda[i]) ||
		    !isfinite(dt->log_w[i]) || isnan(dt->log_m[i]) ||
		    dt->log_m[i] == INFINITY)
			return -1;
		if (dt->log_w[i] > top)
			top = dt->log_w[i];
	}
	for (i = 0; i < dt->k; i++)
		s += exp(dt->log_w[i] - top);
	/* weights summing above one would void the guarantee */
	return top + log(s) <= 1e-9 ? 0 : -1;
}

/*
 * Budget form "average run length": series detectors each alarming at
 * log(series * arl) average to one e-detector at threshold arl (the mean
 * of e-detectors is one), so the mean time to the first false alarm of
 * any of them is at least arl blocks, and over a horizon of T blocks
 * P(any false alarm) <= T / arl.
 */
double
stats_detect_threshold(double arl_blocks, double series)
{
	if (!(arl_blocks >= 1) || !(series >= 1) || !isfinite(arl_blocks) ||
	    !isfinite(series))
		return NAN;
	return log(series) + log(arl_blocks);
}
