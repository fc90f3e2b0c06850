/*
 * stats.h: the statistics of stopcock, one implementation for the daemon,
 * replay, the simulator and the tests. Pure functions of numbers: nothing
 * here knows about experiments, names or configuration. Everything is in
 * log space; "log evidence" means the log of a test (super)martingale or
 * e-process value, compared against log(1/alpha) (Ville's inequality).
 *
 * Families (each file cites its papers beside the code):
 *   special.c    log Phi, log incomplete beta, chi-square tail
 *   mixture.c    normal mixtures: mSPRT (Johari, Pekelis & Walsh 2022) and
 *                HRMS boundaries (Howard, Ramdas, McAuliffe & Sekhon 2021)
 *   dirichlet.c  Dirichlet-multinomial SRM and beta/categorical rate tests
 *                (Lindon & Malek 2022); beta-binomial mixtures (HRMS 2021)
 *   quantile.c   quantile confidence sequences and two-sample quantile
 *                tests (Howard & Ramdas 2022)
 *   fixed.c      fixed-horizon figures (chi-square SRM, z-test, sample
 *                sizes), labelled as one-look numbers wherever shown
 */
#ifndef STOPCOCK_STATS_H
#define STOPCOCK_STATS_H

#include <stddef.h>
#include <stdint.h>

/* ---- special.c ---- */
double	stats_log_ndtr(double z);		/* log Phi(z), accurate for z << 0 */
double	stats_norm_sf(double z);		/* 1 - Phi(z) */
double	stats_norm_ppf(double p);		/* Phi^{-1}(p) */
double	stats_log_beta(double a, double b);	/* log B(a, b) */
/* log I_x(a, b), the regularised incomplete beta, without underflow. */
double	stats_log_betainc(double a, double b, double x);
/* log(1 - I_x(a, b)) = log I_{1-x}(b, a). */
double	stats_log_betainc_upper(double a, double b, double x);
double	stats_chi2_sf(double x, double df);	/* upper tail of chi-square */
double	stats_logsumexp(double a, double b);
/* Always-valid p-value from the running maximum of log evidence. */
double	stats_p_from_log_e(double max_log_e);

/* ---- mixture.c: normal mixtures ---- */
/* HRMS tuning: rho so the boundary is tightest at intrinsic time v_opt
 * (two-sided; one_sided uses alpha -> 2 alpha). */
double	stats_nm_rho(double v_opt, double alpha, int one_sided);
double	stats_nm_logm(double s, double v, double rho);	/* two-sided */
double	stats_nm_logm1(double s, double v, double rho);	/* one-sided, upper */
double	stats_nm_bound(double v, double rho, double alpha);
double	stats_nm_bound1(double v, double rho, double alpha);
/*
 * mSPRT, generic form for unequal arms (JPW 2022; docs/methods.md sec. 1):
 * est is the estimated difference, V its variance, tau2 the mixing
 * variance, theta0 the null value. Returns log Lambda (0 when V <= 0).
 */
double	stats_msprt_log_lr(double est, double theta0, double V, double tau2);
/* Half-width of the confidence sequence at level alpha (inf when V<=0). */
double	stats_msprt_halfwidth(double V, double tau2, double alpha);
/* tau^2 tuned to be tightest at n_opt steps of per-step variance v_unit. */
double	stats_msprt_tau2(double v_unit, double alpha, double n_opt);
/*
 * One-sided harm evidence with a margin (docs/methods.md, "harm
 * evidence"): the half-normal mixture over excesses lambda >= 0 of the
 * Gaussian likelihood ratio, for d = s * estimate - margin (positive
 * means beyond the margin in the harmful direction) with variance V and
 * mixing scale tau2. A supermartingale on the whole null "no harm beyond
 * the margin"; a better treatment drives it towards 0. Returns log E,
 * 0 when V or tau2 is not a positive finite number.
 */
double	stats_harm_log_e(double d, double V, double tau2);
/* The smallest d with stats_harm_log_e(d, V, tau2) >= log(1/alpha). */
double	stats_harm_boundary(double V, double tau2, double alpha);
/*
 * Proportions under the null p_T - p_C = D: the restricted maximum
 * likelihood estimates (Farrington & Manning 1990, method 3), found by
 * bisection on the score. Returns 0, or -1 when the data carry no
 * information (no arm has trials).
 */
int	stats_prop_null(double x_t, double n_t, double x_c, double n_c,
	    double D, double *p_t, double *p_c);
/*
 * Random-group variance of a ratio R = sum S_g / sum N_g over G groups
 * (Wolter 2007, ch. 2, in linearised form): G/(G-1) sum (S_g - R N_g)^2
 * / N^2. Sets *R; returns the variance (NAN when N is 0 or G < 2).
 */
double	stats_group_var(int G, const double *S, const double *N, double *R);
/* The same over S[g * stride], N[g * stride]: groups kept as interleaved
 * (S, N) pairs (stride 2), the same sums in the same order. */
double	stats_group_var_strided(int G, const double *S, const double *N,
	    int stride, double *R);
/*
 * Inflation for a variance estimated from nu + 1 groups, so the test's
 * tail at one-sided probability q matches a t with nu degrees of freedom:
 * kappa = (t_nu^-1(1 - q) / z_{1-q})^2.
 */
double	stats_group_kappa(double nu, double q);

/* ---- dirichlet.c: SRM, rates, beta-binomial mixtures ---- */
#define STATS_ARMS_MAX 16
/* log Bayes factor of Dirichlet(a0) against theta0 for counts (K arms). */
double	stats_dm_log_bf(int K, const double *counts, const double *theta0,
	    const double *a0);
/*
 * Exact batch update: given posterior a (a0 + counts so far), add batch x
 * and return the increment of log BF; a is updated in place.
 */
double	stats_dm_update(int K, double *a, const double *x,
	    const double *theta0);
/* Concentration k0 so the K=2 test is tightest at n_opt units. */
double	stats_dm_k0(double n_opt, double alpha);
/* Classic one-look chi-square goodness of fit; returns p, sets *x2. */
double	stats_srm_chi2(int K, const double *counts, const double *theta0,
	    double *x2);
/*
 * Rate test (events over exposure): n_a events in control, n_b in the
 * treatment, theta0 = treatment's exposure share, prior
 * Beta(k theta0, k (1 - theta0)). one_sided: treatment rate higher.
 */
double	stats_rate_log_bf(double n_a, double n_b, double theta0, double k,
	    int one_sided);
/*
 * Confidence set for the rate ratio r = rate_b / rate_a at level alpha by
 * inverting the two-sided test over r. Returns 0 and [lo, hi] (hi may be
 * inf, lo may be 0).
 */
int	stats_rate_ratio_cs(double n_a, double e_a, double n_b, double e_b,
	    double k, double alpha, double *lo, double *hi);
/*
 * One-sided confidence bound for the rate ratio at level alpha, by
 * inverting the one-sided test: the lower bound (upper = 0) is the
 * smallest r whose "ratio <= r" null the one-sided factor does not
 * reject; the upper bound the largest r whose "ratio >= r" null it does
 * not reject. A harm verdict from the one-sided test at r0 holds exactly
 * when the lower bound exceeds r0. Returns 0 (bound may be 0 or inf).
 */
int	stats_rate_ratio_bound(double n_a, double e_a, double n_b, double e_b,
	    double k, double alpha, int upper, double *bound);
/* Beta-binomial mixture (HRMS Props 6/7) with increments in {-g, +h}. */
double	stats_bb_r(double v_opt, double g, double h, double alpha,
	    int one_sided);
double	stats_bb_logm(double s, double v, double g, double h, double r,
	    int one_sided);
double	stats_bb_bound(double v, double g, double h, double r,
	    double alpha, int one_sided);
/* Bernoulli-mean confidence sequence (k events in n trials). */
int	stats_bernoulli_cs(double k, double n, double t_opt, double alpha,
	    double *lo, double *hi);

/* ---- quantile.c ---- */
/*
 * Data come as tie blocks: ascending distinct values with counts (a
 * sketch's buckets, or raw sorted data with count 1).
 */
struct stats_blocks {
	const double	*value;
	const uint64_t	*count;
	size_t		 n;		/* number of blocks */
	uint64_t	 total;		/* sum of counts */
	double		 weight;	/* each count stands for this many
					 * samples, in (0, 1]; 0 means 1 */
};
/*
 * Time-uniform CS for the p-quantile (Howard & Ramdas 2022), tuned at
 * t_opt samples. Returns 0 with [lo, hi] (-inf / +inf when the rank falls
 * outside the data), -1 when empty.
 */
int	stats_quantile_cs(const struct stats_blocks *, double p, double t_opt,
	    double alpha, double *lo, double *hi);
/*
 * Two-sample tests of H0: Q_a(p) = Q_b(p) (two-sided, Thm 5) and
 * H0: Q_b(p) <= Q_a(p) (one-sided, docs/methods.md sec. 4). Return the log
 * evidence min_x [G_a(x) + G_b(x)]; its running maximum gives the
 * always-valid p-value.
 */
double	stats_quantile_log_e2(const struct stats_blocks *a,
	    const struct stats_blocks *b, double p, double t_opt);
double	stats_quantile_log_e1(const struct stats_blocks *a,
	    const struct stats_blocks *b, double p, double t_opt);

/* ---- fixed.c: one-look figures ---- */
/* Two-proportion z-test; returns two-sided p, sets *z. */
double	stats_ztest_prop(double x_a, double n_a, double x_b, double n_b,
	    double *z);
/* Two-sided Wald z-test of H0: effect = 0 for an estimate with variance
 * var; returns p, sets *z. The naive analyst's test in the simulator. */
double	stats_ztest(double est, double var, double *z);
/* Per-arm n for a two-sided level-alpha z-test with the given power to
 * detect a difference delta with per-observation variances var_a, var_b
 * (equal allocation). */
double	stats_fixed_n(double delta, double var_a, double var_b, double alpha,
	    double power);

/* ---- detect.c: change detection ---- */
/*
 * A mixture over a grid of excess sizes of Page's CUSUM on one-sided
 * Gaussian block scores (Page 1954; Shin, Ramdas & Rinaldo 2023). A plain
 * struct of numbers: it lives inside its owner's state and is saved as
 * such. Under no change the alarm time at log c has E[N] >= c blocks.
 */
#define STATS_DETECT_GRID 12
struct stats_detect {
	int	 k;			/* grid points in use */
	double	 blocks;		/* blocks seen */
	double	 lambda[STATS_DETECT_GRID];	/* excesses, effect units */
	double	 log_w[STATS_DETECT_GRID];	/* log weights, sum 1 */
	double	 log_m[STATS_DETECT_GRID];	/* log CUSUM; -inf: none */
	double	 start[STATS_DETECT_GRID];	/* time its run started */
};
/*
 * Log-spaced grid of k points in [lambda_min, lambda_max], equal weights,
 * no run yet. Returns -1 (and leaves an inert detector, k = 0, whose
 * log M stays -inf) unless 0 < lambda_min <= lambda_max < inf and
 * 1 <= k <= STATS_DETECT_GRID.
 */
int	stats_detect_init(struct stats_detect *, double lambda_min,
	    double lambda_max, int k);
/* Forget every run (a new epoch, or after an alarm); keeps the grid. */
void	stats_detect_reset(struct stats_detect *);
/*
 * One block with score X = d I and information I; t is stored as the
 * start of any run that begins with this block. Returns log M. A block
 * with I <= 0, X or I not finite, or a log ratio that overflows is
 * skipped: state unchanged, blocks not counted (so callers can count
 * it as rejected).
 */
double	stats_detect_update(struct stats_detect *, double X, double I,
	    double t);
double	stats_detect_log_m(const struct stats_detect *);
/* 0 if the numbers are a state init/update could produce (k = 0 too),
 * -1 if not: for state read back from a checkpoint. */
int	stats_detect_check(const struct stats_detect *);
/* Start time of the run of the grid point that weighs most in log M. */
double	stats_detect_change_start(const struct stats_detect *);
/* log c for series detectors sharing a mean run length of arl blocks. */
double	stats_detect_threshold(double arl_blocks, double series);
/* Page's CUSUM and Shiryaev-Roberts recursions in log form. */
double	stats_cusum_update(double w, double l);
double	stats_sr_update(double log_r, double l);

#endif
