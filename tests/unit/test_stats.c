/*
 * test_stats.c: the statistics module against the check values of
 * docs/methods.md sec. 10 and a few figures from scipy. Each row
 * names its docs/methods.md section and source tag: [L] a general-purpose
 * library's unit test or scipy, [C] independent Python computation,
 * [P] printed in a paper. Values match to 1e-6 relative or to the digits
 * printed. Edge cases check guards (V = 0, empty arms, zero counts) and
 * that 10^9 records give finite answers that agree across the two
 * independent code paths (lgamma differences vs. Stirling log-beta).
 */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <string.h>
#include <stdio.h>
#include <stdlib.h>
#include <math.h>

#include <cmocka.h>

#include "stopcock/stats.h"

/*
 * Pass when got is within 1e-6 relative of want, or within half a unit
 * of the last printed decimal (dec = number of printed decimals).
 */
static int
near(const char *what, double got, double want, int dec)
{
	double tol = 1e-6 * fabs(want), dig = 0.5 * pow(10, -dec) * 1.000001;

	if (dec >= 0 && dig > tol)
		tol = dig;
	if (fabs(got - want) <= tol || (isinf(got) && got == want))
		return 1;
	print_error("%s: got %.10g want %.10g (tol %.3g)\n", what, got, want,
	    tol);
	return 0;
}

#define NEAR(what, got, want, dec) assert_true(near(what, got, want, dec))

/* "what, row NAME": a table row's failure names the row. */
static const char *
row_label(char *buf, size_t size, const char *what, const char *row)
{
	snprintf(buf, size, "%s, row \"%s\"", what, row);
	return buf;
}

#define ROW(what, row) row_label(label, sizeof label, what, row)

/* ---- 10.1 normal mixtures (HRMS 2021), v_opt = 100, alpha = 0.05 ---- */
static void
test_nm_hrms(void **state)
{
	double r2 = stats_nm_rho(100, 0.05, 0), r1 = stats_nm_rho(100, 0.05, 1);

	NEAR("rho two-sided [10.1 L=C]", r2, 12.60056, 5);
	NEAR("rho one-sided [10.1 C]", r1, 15.800635, 6);
	NEAR("log m s=10 v=100 [10.1 L=C]", stats_nm_logm(10, 100, r2),
	    -0.6510052, 7);
	NEAR("bound v=100 [10.1 L=C]", stats_nm_bound(100, r2, 0.05),
	    30.35209, 5);
	NEAR("log m1 s=10 v=100 [10.1 L=C]", stats_nm_logm1(10, 100, r1),
	    -0.06502391, 8);
	NEAR("bound1 v=100 [10.1 L=C]", stats_nm_bound1(100, r1, 0.05),
	    27.66071, 5);
	NEAR("bound at v_opt=1e4 [10.1 C]", stats_nm_bound(10000,
	    stats_nm_rho(10000, 0.05, 0), 0.05), 303.5209, 4);
}

/* ---- 10.2 mSPRT (JPW 2022), paired, theta0 = 0, alpha = 0.05 [C] ---- */
static const struct {
	const char *name;
	double n, diff, sigma2, tau2, lambda, hw;
} msprt_rows[] = {
	{ "n=100 d=0.3", 100, 0.3, 1, 0.01, 1.728523, 0.619529 },  /* row 1 */
	{ "n=1000 d=0.1", 1000, 0.1, 1, 0.01, 3.278722, 0.136674 }, /* row 2 */
	{ "n=400 d=0", 400, 0.0, 4, 0.05, 0.534522, 0.450376 },    /* row 3 */
};

static void
test_msprt_table(void **state)
{
	char label[128];
	size_t i;
	double V, l;

	for (i = 0; i < sizeof msprt_rows / sizeof msprt_rows[0]; i++) {
		V = 2 * msprt_rows[i].sigma2 / msprt_rows[i].n;
		l = stats_msprt_log_lr(msprt_rows[i].diff, 0, V,
		    msprt_rows[i].tau2);
		NEAR(ROW("Lambda_n [10.2 C]", msprt_rows[i].name), exp(l),
		    msprt_rows[i].lambda, 6);
		NEAR(ROW("half-width [10.2 C]", msprt_rows[i].name),
		    stats_msprt_halfwidth(V, msprt_rows[i].tau2, 0.05),
		    msprt_rows[i].hw, 6);
	}
	/* 1/Lambda column of rows 1 and 2 [10.2 C] */
	NEAR("1/Lambda row 1 [10.2 C]", exp(-stats_msprt_log_lr(0.3, 0, 0.02,
	    0.01)), 0.578529, 6);
	NEAR("1/Lambda row 2 [10.2 C]", exp(-stats_msprt_log_lr(0.1, 0, 0.002,
	    0.01)), 0.304997, 6);
	/* p = 1 when Lambda < 1 (row 3) */
	assert_true(stats_p_from_log_e(log(0.534522)) == 1.0);
}

/* Same case 1 through the HRMS mapping rho = V_unit^2/tau^2 [10.2 C]. */
static void
test_msprt_hrms_mapping(void **state)
{
	NEAR("log m rho=400 s=30 v=200 [10.2 C]", stats_nm_logm(30, 200, 400),
	    0.547267, 6);
	NEAR("one-sided +0.3 [10.2 C]", exp(stats_nm_logm1(30, 200, 400)),
	    3.075611, 6);
	NEAR("one-sided -0.3 [10.2 C]", exp(stats_nm_logm1(-30, 200, 400)),
	    0.381436, 6);
	NEAR("one-sided 0 [10.2 C]", exp(stats_nm_logm1(0, 200, 400)),
	    0.816497, 6);
}

/* Paired sequence, sigma^2 = tau^2 = 1 [10.2 C]. */
static void
test_msprt_sequence(void **state)
{
	static const double z[8] = { 0.9, 1.4, -0.3, 2.0, 1.1, 1.6, 0.7,
	    1.9 };
	static const double lam[8] = { 0.873513, 0.984178, 0.772483,
	    1.124525, 1.353301, 2.033311, 2.157764, 3.886586 };
	static const double pv[8] = { 1, 1, 1, 0.889265, 0.738934, 0.491809,
	    0.463443, 0.257295 };
	double sum = 0, maxl = 0, lo = -INFINITY, hi = INFINITY, V, m, l, hw;
	char label[128], step[16];
	int n;

	for (n = 1; n <= 8; n++) {
		snprintf(step, sizeof step, "n=%d", n);
		sum += z[n - 1];
		m = sum / n;
		V = 2.0 / n;
		l = stats_msprt_log_lr(m, 0, V, 1);
		if (l > maxl)
			maxl = l;
		NEAR(ROW("Lambda_n sequence [10.2 C]", step), exp(l),
		    lam[n - 1], 6);
		NEAR(ROW("p_n sequence [10.2 C]", step),
		    stats_p_from_log_e(maxl), pv[n - 1], 6);
		hw = stats_msprt_halfwidth(V, 1, 0.05);
		if (m - hw > lo)
			lo = m - hw;
		if (m + hw < hi)
			hi = m + hw;
	}
	NEAR("running CS lo n=8 [10.2 C]", lo, -0.378695, 6);
	NEAR("running CS hi n=8 [10.2 C]", hi, 2.703695, 6);
}

static void
test_msprt_tau2_bernoulli(void **state)
{
	double V = 0.05 * 0.95 / 10000 + 0.058 * 0.942 / 10000;

	NEAR("tau2 n_opt=1000 [10.2 C]", stats_msprt_tau2(2, 0.05, 1000),
	    0.0158723, 7);
	NEAR("tau2 n_opt=1e4 [10.2 C]", stats_msprt_tau2(2, 0.05, 10000),
	    0.00158723, 8);
	NEAR("Bernoulli V [10.2 C]", V, 1.021360e-5, 11);
	NEAR("log Lambda tau2=1e-4 [10.2 C]", stats_msprt_log_lr(0.008, 0, V,
	    1e-4), 1.653382, 6);
	NEAR("Lambda tau2=1e-4 [10.2 C]", exp(stats_msprt_log_lr(0.008, 0, V,
	    1e-4)), 5.224620, 6);
	NEAR("half-width tau2=1e-4 [10.2 C]", stats_msprt_halfwidth(V, 1e-4,
	    0.05), 0.009707, 6);
	NEAR("Lambda tau2=1e-5 [10.2 C]", exp(stats_msprt_log_lr(0.008, 0, V,
	    1e-5)), 3.349018, 6);
}

static void
test_msprt_edges(void **state)
{
	/* V = 0 (burn-in), negative or non-finite V: no evidence, no CS */
	assert_true(stats_msprt_log_lr(0.5, 0, 0, 0.01) == 0);
	assert_true(stats_msprt_log_lr(0.5, 0, -1, 0.01) == 0);
	assert_true(stats_msprt_log_lr(0.5, 0, NAN, 0.01) == 0);
	assert_true(stats_msprt_log_lr(0.5, 0, INFINITY, 0.01) == 0);
	assert_true(isinf(stats_msprt_halfwidth(0, 0.01, 0.05)));
	/* a tiny V must not overflow: log Lambda ~ d^2/(2V) */
	assert_true(isfinite(stats_msprt_log_lr(1e-3, 0, 1e-300, 1)));
	assert_true(stats_p_from_log_e(-3) == 1 && stats_p_from_log_e(0) ==
	    1);
	NEAR("p from log e", stats_p_from_log_e(log(20)), 0.05, 12);
}

/* ---- 10.3 SRM Dirichlet-multinomial (Lindon & Malek 2022) [C] ---- */
static const struct {
	const char *name;
	int K;
	double c[3], th[3], a0[3], logbf;
} dm_rows[] = {
	{ "3:1", 2, { 3, 1 }, { .5, .5 }, { 1, 1 }, -0.223144 },
	{ "10:0", 2, { 10, 0 }, { .5, .5 }, { 1, 1 }, 4.533577 },
	{ "5000:5300 a0=50", 2, { 5000, 5300 }, { .5, .5 }, { 50, 50 },
	    2.003268 },
	{ "50000:50600 a0=50", 2, { 50000, 50600 }, { .5, .5 }, { 50, 50 },
	    -1.672347 },
	{ "50000:51000 a0=50", 2, { 50000, 51000 }, { .5, .5 }, { 50, 50 },
	    1.483883 },
	{ "50000:51000 a0=629.5", 2, { 50000, 51000 }, { .5, .5 },
	    { 629.5, 629.5 }, 2.690879 },
	{ "three arms 2:3:5", 3, { 190, 310, 500 }, { .2, .3, .5 },
	    { 20, 30, 50 }, -2.015817 },
	{ "three equal arms", 3, { 1000, 1000, 1000 },
	    { 1. / 3, 1. / 3, 1. / 3 }, { 10, 10, 10 }, -4.637115 },
};

static void
test_dm_table(void **state)
{
	char label[128];
	size_t i;

	for (i = 0; i < sizeof dm_rows / sizeof dm_rows[0]; i++)
		NEAR(ROW("DM log BF [10.3 C]", dm_rows[i].name),
		    stats_dm_log_bf(dm_rows[i].K, dm_rows[i].c, dm_rows[i].th,
		    dm_rows[i].a0), dm_rows[i].logbf, 6);
	/* exact forms printed beside rows 1 and 2 [10.3 C] */
	NEAR("BF (3,1) = 16 B(4,2) [10.3 C]", exp(stats_dm_log_bf(2,
	    dm_rows[0].c, dm_rows[0].th, dm_rows[0].a0)), 0.8, 12);
	NEAR("BF (10,0) = 1024/11 [10.3 C]", exp(stats_dm_log_bf(2,
	    dm_rows[1].c, dm_rows[1].th, dm_rows[1].a0)), 1024.0 / 11, 9);
}

/* Per-unit stream A,B,B,A,B,B,B,A,B,B, a0 = (1,1) [10.3 C]. */
static void
test_dm_stream(void **state)
{
	static const int arm[10] = { 0, 1, 1, 0, 1, 1, 1, 0, 1, 1 };
	static const double bf[10] = { 1, 0.666667, 0.666667, 0.533333,
	    0.533333, 0.609524, 0.761905, 0.507937, 0.609524, 0.775758 };
	double a[2] = { 1, 1 }, th[2] = { .5, .5 }, x[2], lbf = 0;
	double c37[2] = { 3, 7 }, a0[2] = { 1, 1 };
	char label[128], unit[24];
	int i;

	for (i = 0; i < 10; i++) {
		x[0] = arm[i] == 0;
		x[1] = arm[i] == 1;
		lbf += stats_dm_update(2, a, x, th);
		snprintf(unit, sizeof unit, "unit %d", i + 1);
		NEAR(ROW("DM stream BF [10.3 C]", unit), exp(lbf), bf[i], 6);
	}
	assert_true(a[0] == 4 && a[1] == 8);
	NEAR("stream = batch (3,7) [10.3 C]", lbf, stats_dm_log_bf(2, c37, th,
	    a0), 12);
}

static void
test_dm_k0(void **state)
{
	NEAR("k0 N_opt=1000 [10.3 C]", stats_dm_k0(1000, 0.05), 125.006, 3);
	NEAR("k0 N_opt=1e4 [10.3 C]", stats_dm_k0(1e4, 0.05), 1259.056, 3);
	NEAR("k0 N_opt=1e5 [10.3 C]", stats_dm_k0(1e5, 0.05), 12599.561, 3);
	assert_true(stats_dm_k0(1, 0.05) > 0);
}

static void
test_dm_edges(void **state)
{
	double zero[3] = { 0, 0, 0 }, th[3] = { .2, .3, .5 };
	double a0[3] = { 2, 3, 5 }, c[3] = { 0, 5, 0 }, thz[3] = { 0, .5, .5 };
	double cz[3] = { 3, 5, 0 }, a[3] = { 2, 3, 5 };

	/* empty arms: BF = 1 */
	assert_true(stats_dm_log_bf(3, zero, th, a0) == 0);
	assert_true(stats_dm_update(3, a, zero, th) == 0);
	/* zero counts in some arms: 0 log 0 := 0, finite */
	assert_true(isfinite(stats_dm_log_bf(3, c, th, a0)));
	/* null puts no mass on an arm that has counts: infinite evidence */
	assert_true(stats_dm_log_bf(3, cz, thz, a0) == INFINITY);
	/* bad K */
	assert_true(isnan(stats_dm_log_bf(0, c, th, a0)));
	assert_true(isnan(stats_dm_log_bf(STATS_ARMS_MAX + 1, c, th, a0)));
}

/*
 * 10^9 records: finite, and the lgamma-difference path (DM) agrees with
 * the Stirling log-beta path (rate test, beta-binomial mixture) to 1e-6
 * absolute; ten batches of 10^8 equal one batch (order invariance).
 */
static void
test_huge_counts(void **state)
{
	double c[2] = { 5e8 + 20000, 5e8 - 20000 }, th[2] = { .5, .5 };
	double a0[2] = { 50, 50 }, a[2] = { 50, 50 }, x[2], dm, sum = 0;
	double bb, rate, k0;
	int i;

	dm = stats_dm_log_bf(2, c, th, a0);
	assert_true(isfinite(dm));
	rate = stats_rate_log_bf(c[0], c[1], 0.5, 100, 0);
	NEAR("DM vs rate BF at 1e9", dm, rate, 6);
	for (i = 0; i < 10; i++) {
		x[0] = c[0] / 10;
		x[1] = c[1] / 10;
		sum += stats_dm_update(2, a, x, th);
	}
	NEAR("10 batches = 1 batch at 1e9", sum, dm, 6);
	/*
	 * HRMS beta-binomial at N = 1e9, p = .2: equals the BB Bayes factor.
	 * k0 = rho / (g h) - 1 with rho = v_opt / (2 log(1/alpha) +
	 * log(1 + 2 log(1/alpha))) (Howard, Ramdas, McAuliffe & Sekhon 2021,
	 * sec. 3.5), v_opt = 100, alpha = 0.05, g h = 0.16: numpy gives
	 * 77.75350612; scipy.optimize.brentq on scipy.special.betaln's
	 * Bayes factor for N = 625, k = 135 set equal to confseq's
	 * -0.6941012 (docs/methods.md sec. 10.4) gives 77.7535011 [C].
	 */
	k0 = 77.753506;
	bb = stats_bb_logm(30000, 1e9 * 0.16, 0.2,
	    0.8, k0 * 0.16, 0);
	c[0] = 8e8 - 30000;
	c[1] = 2e8 + 30000;
	th[0] = 0.8;
	th[1] = 0.2;
	a0[0] = k0 * 0.8;
	a0[1] = k0 * 0.2;
	NEAR("BB mixture vs DM at 1e9", bb, stats_dm_log_bf(2, c, th, a0), 6);
	/* one-sided versions stay finite and ordered */
	assert_true(isfinite(stats_rate_log_bf(5e8, 5e8 + 1e5, 0.5, 100, 1)));
	assert_true(isfinite(stats_bb_logm(30000, 1.6e8, 0.2, 0.8, 12.44, 1)));
	assert_true(stats_rate_log_bf(5e8, 5e8 + 1e5, 0.5, 100, 1) >
	    stats_rate_log_bf(5e8, 5e8 + 1e5, 0.5, 100, 0));
}

/* ---- 10.4 beta-binomial mixture, Bernoulli CS [L=C] ---- */
static void
test_bb(void **state)
{
	double r2 = stats_bb_r(100, 0.2, 0.8, 0.05, 0);
	double r1 = stats_bb_r(100, 0.2, 0.8, 0.05, 1);

	NEAR("BB two-sided log m [10.4 L=C]", stats_bb_logm(10, 100, 0.2, 0.8,
	    r2, 0), -0.6941012, 7);
	NEAR("BB = BB Bayes factor N=625 k=135 [10.4 C]", stats_bb_logm(10,
	    100, 0.2, 0.8, 77.753506 * 0.16, 0), -0.6941012, 6);
	NEAR("BB two-sided bound [10.4 L=C]", stats_bb_bound(100, 0.2, 0.8, r2,
	    0.05, 0), 31.4308, 4);
	NEAR("BB one-sided log m [10.4 L=C]", stats_bb_logm(10, 100, 0.2, 0.8,
	    r1, 1), -0.07134019, 8);
	NEAR("BB one-sided bound [10.4 L=C]", stats_bb_bound(100, 0.2, 0.8, r1,
	    0.05, 1), 28.41238, 5);
	NEAR("BB one-sided bound cap v/g [10.4 L=C]", stats_bb_bound(0.32, 0.2,
	    0.8, r1, 0.05, 1), 1.6, 12);
}

/*
 * The [L=C] rows print confseq's digits truncated (not rounded): each of
 * our values must lie in [want, want + 10^-dec). Row 1 also has our own
 * rounded digits [C].
 */
static const struct {
	const char *name;
	double k, n, t_opt, lo, hi;
	int dec;
} bern_rows[] = {
	{ "700/1000", 700, 1000, 100, 0.651629, 0.745949, 6 },
	{ "15/50", 15, 50, 50, 0.129556, 0.511896, 6 },
	{ "5/50", 5, 50, 50, 0.013021, 0.269264, 6 },
	{ "1/50", 1, 50, 50, 0, 0.13489, 5 },
	{ "100/200 t_opt=1", 100, 200, 1, 0.328923, 0.671076, 6 },
};

static int
truncated_to(const char *what, double got, double want, int dec)
{
	double unit = pow(10, -dec);

	if (got >= want && got < want + unit)
		return 1;
	print_error("%s: got %.10g, printed %.*f\n", what, got, dec, want);
	return 0;
}

static void
test_bernoulli_cs(void **state)
{
	char label[128];
	double lo, hi;
	size_t i;

	for (i = 0; i < sizeof bern_rows / sizeof bern_rows[0]; i++) {
		assert_int_equal(stats_bernoulli_cs(bern_rows[i].k,
		    bern_rows[i].n, bern_rows[i].t_opt, 0.05, &lo, &hi), 0);
		assert_true(truncated_to(ROW("Bernoulli CS lo [10.4 L=C]",
		    bern_rows[i].name), lo, bern_rows[i].lo, bern_rows[i].dec));
		assert_true(truncated_to(ROW("Bernoulli CS hi [10.4 L=C]",
		    bern_rows[i].name), hi, bern_rows[i].hi, bern_rows[i].dec));
	}
	/* our own rounded digits for row 1 [10.4 C] */
	assert_int_equal(stats_bernoulli_cs(700, 1000, 100, 0.05, &lo, &hi), 0);
	NEAR("Bernoulli CS 700/1000 lo [10.4 C]", lo, 0.651630, 6);
	NEAR("Bernoulli CS 700/1000 hi [10.4 C]", hi, 0.745950, 6);
	/* no data: the whole interval; k = 0: lower end 0 */
	assert_int_equal(stats_bernoulli_cs(0, 0, 50, 0.05, &lo, &hi), 0);
	assert_true(lo == 0 && hi == 1);
	assert_int_equal(stats_bernoulli_cs(0, 50, 50, 0.05, &lo, &hi), 0);
	assert_true(lo == 0 && hi > 0 && hi < 0.2);
	assert_int_equal(stats_bernoulli_cs(1e9, 1e9, 50, 0.05, &lo, &hi), 0);
	assert_true(hi == 1 && lo > 0.99999 && lo < 1);
	assert_int_equal(stats_bernoulli_cs(3, 2, 50, 0.05, &lo, &hi), -1);
}

/* ---- 10.5 rates with exposure [C] ---- */
static const struct {
	const char *name;
	double na, ea, nb, eb, k, bf2, bf1;
} rate_rows[] = {
	{ "20 vs 40", 20, 1000, 40, 1000, 100, 2.78777, 5.26212 },
	{ "30 vs 30, 3x exposure", 30, 1500, 30, 500, 100, 23.6857, 48.6611 },
	{ "100 vs 100", 100, 1000, 100, 1000, 100, 0.576389, 0.576389 },
	{ "0 vs 10 k=2", 0, 1000, 10, 1000, 2, 93.0909, 186.091 },
};

static void
test_rate_table(void **state)
{
	char label[128];
	double th;
	size_t i;

	for (i = 0; i < sizeof rate_rows / sizeof rate_rows[0]; i++) {
		th = rate_rows[i].eb / (rate_rows[i].ea + rate_rows[i].eb);
		NEAR(ROW("rate two-sided BF [10.5 C]", rate_rows[i].name),
		    exp(stats_rate_log_bf(rate_rows[i].na, rate_rows[i].nb, th,
		    rate_rows[i].k, 0)), rate_rows[i].bf2, 4);
		NEAR(ROW("rate one-sided BF [10.5 C]", rate_rows[i].name),
		    exp(stats_rate_log_bf(rate_rows[i].na, rate_rows[i].nb, th,
		    rate_rows[i].k, 1)), rate_rows[i].bf1, 3);
	}
}

static void
test_rate_edges(void **state)
{
	double lo, hi, l;

	/* no events: BF = 1 both ways */
	assert_true(fabs(stats_rate_log_bf(0, 0, 0.3, 10, 0)) < 1e-12);
	assert_true(fabs(stats_rate_log_bf(0, 0, 0.3, 10, 1)) < 1e-12);
	assert_true(isnan(stats_rate_log_bf(1, 1, 0, 10, 0)));
	assert_true(isnan(stats_rate_log_bf(1, 1, 0.5, 0, 0)));
	/* ratio CS: contains the point estimate, log BF = log 20 at ends */
	assert_int_equal(stats_rate_ratio_cs(20, 1000, 40, 1000, 100, 0.05,
	    &lo, &hi), 0);
	assert_true(lo < 2 && hi > 2 && lo > 0 && isfinite(hi));
	l = stats_rate_log_bf(20, 40, lo / (lo + 1), 100, 0);
	NEAR("rate CS lower end on the boundary", l, log(20), 9);
	l = stats_rate_log_bf(20, 40, hi / (hi + 1), 100, 0);
	NEAR("rate CS upper end on the boundary", l, log(20), 9);
	/* zero counts on one side: open end */
	assert_int_equal(stats_rate_ratio_cs(0, 1000, 10, 1000, 2, 0.05, &lo,
	    &hi), 0);
	assert_true(lo > 0 && isinf(hi));
	assert_int_equal(stats_rate_ratio_cs(10, 1000, 0, 1000, 2, 0.05, &lo,
	    &hi), 0);
	assert_true(lo == 0 && isfinite(hi) && hi > 0);
	assert_int_equal(stats_rate_ratio_cs(0, 1000, 0, 1000, 2, 0.05, &lo,
	    &hi), 0);
	assert_true(lo == 0 && isinf(hi));
	assert_int_equal(stats_rate_ratio_cs(1, 0, 1, 1, 2, 0.05, &lo, &hi),
	    -1);
	/* 10^9 events: a tight interval around 1.0002 */
	assert_int_equal(stats_rate_ratio_cs(5e8, 1e6, 5.001e8, 1e6, 100, 0.05,
	    &lo, &hi), 0);
	assert_true(lo < 1.0002 && hi > 1.0002 && hi - lo < 1e-3);
}

/* ---- 10.4 quantiles (Howard & Ramdas 2022) ---- */

/* Blocks for the values off+1 .. off+N, each once. */
struct seq_blocks {
	double		*v;
	uint64_t	*c;
	struct stats_blocks b;
};

static void
seq_make(struct seq_blocks *s, size_t N, double off)
{
	size_t i;

	s->v = calloc(N, sizeof *s->v);
	s->c = calloc(N, sizeof *s->c);
	assert_non_null(s->v);
	assert_non_null(s->c);
	for (i = 0; i < N; i++) {
		s->v[i] = off + (double)(i + 1);
		s->c[i] = 1;
	}
	s->b.value = s->v;
	s->b.count = s->c;
	s->b.n = N;
	s->b.total = N;
	s->b.weight = 1;
}

static void
seq_free(struct seq_blocks *s)
{
	free(s->v);
	free(s->c);
}

/* Fixed-quantile CS on data 1..N, alpha = alpha_opt = 0.05 [10.4 C]. */
static const struct {
	const char *name;
	size_t N;
	double p, t_opt, u_lo, u_up, lo, hi;
} qcs_rows[] = {
	{ "median of 1000", 1000, 0.5, 100, 51.4665, 51.4665, 449, 552 },
	{ "p90 of 1000", 1000, 0.9, 100, 32.8105, 29.1763, 868, 930 },
	{ "p99 of 10000", 10000, 0.99, 10000, 32.0231, 28.3620, 9868, 9929 },
	{ "median of 100", 100, 0.5, 100, 15.0484, 15.0484, 35, 66 },
};

static void
test_quantile_cs(void **state)
{
	struct seq_blocks s;
	double lo, hi, p, v, r;
	char label[128];
	const char *name;
	size_t i;

	for (i = 0; i < sizeof qcs_rows / sizeof qcs_rows[0]; i++) {
		name = qcs_rows[i].name;
		p = qcs_rows[i].p;
		v = p * (1 - p) * (double)qcs_rows[i].N;
		r = stats_bb_r(p * (1 - p) * qcs_rows[i].t_opt, p, 1 - p, 0.05,
		    0);
		NEAR(ROW("quantile u_lo [10.4 C]", name), stats_bb_bound(v,
		    1 - p, p, r, 0.05, 0), qcs_rows[i].u_lo, 4);
		NEAR(ROW("quantile u_up [10.4 C]", name), stats_bb_bound(v, p,
		    1 - p, r, 0.05, 0), qcs_rows[i].u_up, 4);
		seq_make(&s, qcs_rows[i].N, 0);
		assert_int_equal(stats_quantile_cs(&s.b, p, qcs_rows[i].t_opt,
		    0.05, &lo, &hi), 0);
		NEAR(ROW("quantile CS lo [10.4 C]", name), lo, qcs_rows[i].lo,
		    0);
		NEAR(ROW("quantile CS hi [10.4 C]", name), hi, qcs_rows[i].hi,
		    0);
		seq_free(&s);
	}
	/* ranks outside the data: infinite ends; empty: error */
	seq_make(&s, 5, 0);
	assert_int_equal(stats_quantile_cs(&s.b, 0.5, 100, 0.05, &lo, &hi), 0);
	assert_true(lo == -INFINITY && hi == INFINITY);
	s.b.n = 0;
	assert_int_equal(stats_quantile_cs(&s.b, 0.5, 100, 0.05, &lo, &hi),
	    -1);
	seq_free(&s);
}

/*
 * Same data as one tie block per value with count 1000 vs 1000 copies:
 * blocks and raw order statistics must give the same CS.
 */
static void
test_quantile_cs_ties(void **state)
{
	double v[3] = { 1, 2, 3 }, lo, hi;
	uint64_t c[3] = { 3000, 4000, 3000 };
	struct stats_blocks b = { v, c, 3, 10000, 1 };

	assert_int_equal(stats_quantile_cs(&b, 0.5, 1000, 0.05, &lo, &hi), 0);
	assert_true(lo == 2 && hi == 2);
	assert_int_equal(stats_quantile_cs(&b, 0.3, 1000, 0.05, &lo, &hi), 0);
	assert_true(lo == 1 && hi == 2);
}

/*
 * Two-sample p-values, A = 1..1000, B = A + offset, t_opt = 100,
 * alpha_opt = 0.05. Two-sided [10.4 L=C], one-sided [10.4 C].
 */
static const struct {
	const char *name;
	double p, off, p2, p1;
} q2_rows[] = {
	{ "median +70", 0.5, 70, 0.814704, 0.1660327 },
	{ "median +85", 0.5, 85, 0.0838055, 0.0168254 },
	{ "median +100", 0.5, 100, 0.0054947, 0.0011056 },
	{ "p90 +55", 0.9, 55, 0.0340463, 0.0064739 },
	{ "median -100", 0.5, -100, -1, 1.0 },
};

static void
test_quantile_two_sample(void **state)
{
	struct seq_blocks a, b;
	char label[128];
	size_t i;

	seq_make(&a, 1000, 0);
	for (i = 0; i < sizeof q2_rows / sizeof q2_rows[0]; i++) {
		seq_make(&b, 1000, q2_rows[i].off);
		if (q2_rows[i].p2 >= 0)
			NEAR(ROW("two-sample two-sided p [10.4 L=C]",
			    q2_rows[i].name), stats_p_from_log_e(
			    stats_quantile_log_e2(&a.b, &b.b, q2_rows[i].p,
			    100)), q2_rows[i].p2, 7);
		NEAR(ROW("two-sample one-sided p [10.4 C]", q2_rows[i].name),
		    stats_p_from_log_e(stats_quantile_log_e1(&a.b, &b.b,
		    q2_rows[i].p, 100)), q2_rows[i].p1, 7);
		seq_free(&b);
	}
	seq_free(&a);
}

static void
test_quantile_edges(void **state)
{
	struct seq_blocks a, b;

	seq_make(&a, 10, 0);
	seq_make(&b, 10, 0);
	b.b.n = 0;
	b.b.total = 0;
	/* an empty arm: no evidence */
	assert_true(stats_quantile_log_e2(&a.b, &b.b, 0.5, 100) == 0);
	assert_true(stats_quantile_log_e1(&a.b, &b.b, 0.5, 100) == 0);
	assert_true(stats_quantile_log_e1(&b.b, &a.b, 0.5, 100) == 0);
	/* identical arms: two-sided evidence below 0 (p = 1) */
	b.b.n = 10;
	b.b.total = 10;
	assert_true(stats_quantile_log_e2(&a.b, &b.b, 0.5, 100) <= 0);
	seq_free(&a);
	seq_free(&b);
}

/* Sketch-sized inputs with 10^9 records stay finite. */
static void
test_quantile_huge(void **state)
{
	double va[500], vb[500], e1, e2, lo, hi;
	uint64_t ca[500], cb[500];
	struct stats_blocks a = { va, ca, 500, 0, 1 }, b = { vb, cb, 500, 0, 1 };
	size_t i;

	for (i = 0; i < 500; i++) {
		va[i] = vb[i] = 1.02 * (double)(i + 1);
		ca[i] = 2000000;
		cb[i] = i < 250 ? 1990000 : 2010000;
		a.total += ca[i];
		b.total += cb[i];
	}
	e2 = stats_quantile_log_e2(&a, &b, 0.5, 1e6);
	e1 = stats_quantile_log_e1(&a, &b, 0.5, 1e6);
	assert_true(isfinite(e1) && isfinite(e2));
	/* B shifted up by 0.5% of its mass: clear evidence both ways */
	assert_true(e1 > 10 && e2 > 10 && e1 > e2);
	assert_true(stats_quantile_log_e1(&b, &a, 0.5, 1e6) < 0);
	assert_int_equal(stats_quantile_cs(&a, 0.99, 1e6, 0.05, &lo, &hi), 0);
	assert_true(lo == va[494] && hi == va[495]);
}

/* ---- special functions ---- */
static void
test_special(void **state)
{
	double v, lo, up;
	int i;

	/* [L scipy] special.log_ndtr(-40) (docs/methods.md sec. 9) */
	NEAR("log_ndtr(-40) [9 L]", stats_log_ndtr(-40), -804.6084420138, 10);
	/* [L scipy] log_ndtr(-5), log_ndtr(3), ndtri */
	NEAR("log_ndtr(-5) [L scipy]", stats_log_ndtr(-5), -15.064998393988727,
	    -1);
	NEAR("log_ndtr(3) [L scipy]", stats_log_ndtr(3),
	    -0.001350809964748193, -1);
	NEAR("ndtri(0.975) [L scipy]", stats_norm_ppf(0.975),
	    1.959963984540054, -1);
	NEAR("ndtri(1e-300) [L scipy]", stats_norm_ppf(1e-300),
	    -37.0470962993612, -1);
	assert_true(stats_log_ndtr(-INFINITY) == -INFINITY);
	assert_true(stats_log_ndtr(INFINITY) == 0);
	/* continuity at the -30 switch */
	assert_true(fabs(stats_log_ndtr(-30 - 1e-9) - stats_log_ndtr(-30)) <
	    1e-7);
	/* closed forms: I_x(1, b) = 1 - (1-x)^b, I_x(a, 1) = x^a */
	NEAR("I_x(1,1e6), x=1e-300", stats_log_betainc(1, 1e6, 1e-300),
	    log(1e-294), -1);
	NEAR("I_x(3000,1), x=0.5", stats_log_betainc(3000, 1, 0.5),
	    3000 * log(0.5), -1);
	NEAR("I_x(2,2) = 3x^2 - 2x^3", stats_log_betainc(2, 2, 0.3),
	    log(3 * 0.09 - 2 * 0.027), -1);
	NEAR("B(0.5,0.5) = pi", stats_log_beta(0.5, 0.5), log(M_PI), -1);
	/* both tails sum to one, continued fraction and expansion alike */
	for (i = 0; i < 40; i++) {
		double a = i < 20 ? 3 + 7 * i : 5000 + 3e7 * i;
		double b = i < 20 ? 50 - 2 * i : 9000 + 1e7 * (i % 7);
		double x = a / (a + b) + (i % 5 - 2) * 3 * sqrt(a * b) /
		    ((a + b) * sqrt(a + b));

		lo = stats_log_betainc(a, b, x);
		up = stats_log_betainc_upper(a, b, x);
		v = stats_logsumexp(lo, up);
		assert_true(fabs(v) < 1e-9);
	}
	/* deep tails are log values, not zero */
	assert_true(stats_log_betainc(1e6, 1e6, 0.4) < -1e4 &&
	    isfinite(stats_log_betainc(1e6, 1e6, 0.4)));
	assert_true(stats_log_betainc_upper(1e6, 1e6, 0.6) < -1e4 &&
	    isfinite(stats_log_betainc_upper(1e6, 1e6, 0.6)));
	assert_true(stats_log_betainc(2, 3, 0) == -INFINITY);
	assert_true(stats_log_betainc(2, 3, 1) == 0);
	assert_true(isnan(stats_log_betainc(-1, 3, 0.5)));
	assert_true(stats_logsumexp(-INFINITY, -INFINITY) == -INFINITY);
}

/* ---- 10.8 classical [L scipy] ---- */
static const struct {
	const char *name;
	int K;
	double c[3], th[3], x2, p;
} chi2_rows[] = {
	{ "50000:50600", 2, { 50000, 50600 }, { .5, .5 }, 3.578529, 0.058531 },
	{ "1000:1100", 2, { 1000, 1100 }, { .5, .5 }, 4.761905, 0.0290963 },
	{ "821:1179 at 40:60", 2, { 821, 1179 }, { .4, .6 }, 0.918750,
	    0.337803 },
	{ "three arms", 3, { 3300, 3350, 3350 }, { 1. / 3, 1. / 3, 1. / 3 },
	    0.5, 0.778801 },
};

static const struct {
	const char *name;
	double xa, na, xb, nb, z, p;
} z_rows[] = {
	{ "200 vs 250 of 10000", 200, 10000, 250, 10000, 2.383995, 0.0171258 },
	{ "500 vs 580 of 10000", 500, 10000, 580, 10000, 2.502837, 0.0123202 },
	{ "30/1000 vs 45/1200", 30, 1000, 45, 1200, 0.965280, 0.334405 },
};

static void
test_classical(void **state)
{
	double x2, p, z;
	char label[128];
	size_t i;

	for (i = 0; i < sizeof chi2_rows / sizeof chi2_rows[0]; i++) {
		p = stats_srm_chi2(chi2_rows[i].K, chi2_rows[i].c,
		    chi2_rows[i].th, &x2);
		NEAR(ROW("SRM X2 [10.8 L]", chi2_rows[i].name), x2,
		    chi2_rows[i].x2, 6);
		NEAR(ROW("SRM p [10.8 L]", chi2_rows[i].name), p,
		    chi2_rows[i].p, 6);
	}
	for (i = 0; i < sizeof z_rows / sizeof z_rows[0]; i++) {
		p = stats_ztest_prop(z_rows[i].xa, z_rows[i].na, z_rows[i].xb,
		    z_rows[i].nb, &z);
		NEAR(ROW("z [10.8 L]", z_rows[i].name), z, z_rows[i].z, 6);
		NEAR(ROW("z-test p [10.8 L]", z_rows[i].name), p,
		    z_rows[i].p, 7);
	}
	/* z^2 = 2x2 chi-square without Yates [10.8 L] */
	stats_ztest_prop(200, 10000, 250, 10000, &z);
	NEAR("z^2 = chi2 2x2 [10.8 L]", z * z, 5.683433, 6);
	/* [L scipy] chi2.sf(30, 3), chi2.sf(500, 7) */
	NEAR("chi2.sf(30,3) [L scipy]", stats_chi2_sf(30, 3),
	    1.3800570312932553e-06, -1);
	NEAR("chi2.sf(500,7) [L scipy]", stats_chi2_sf(500, 7),
	    8.0167910013494e-104, -1);
	assert_true(stats_chi2_sf(0, 3) == 1);
	/* no traffic, no variation */
	assert_true(stats_ztest_prop(0, 0, 0, 0, &z) == 1 && z == 0);
	assert_true(stats_ztest_prop(0, 10, 0, 10, &z) == 1 && z == 0);
	/* sample size, scipy.stats.norm.ppf [L scipy] */
	NEAR("fixed n d=0.5 var 1+1 [L scipy]", stats_fixed_n(0.5, 1, 1, 0.05,
	    0.8), 62.79103787479271, -1);
	NEAR("fixed n props [L scipy]", stats_fixed_n(0.05, 0.25 * 0.75,
	    0.3 * 0.7, 0.01, 0.9), 2365.822559910516, -1);
	assert_true(isinf(stats_fixed_n(0, 1, 1, 0.05, 0.8)));
}

/*
 * stats_ztest, the two-sided Wald z-test the simulator repeats at several
 * looks to show the peeking inflation (from test_ztest.c). Check values
 * are scipy's 2 * norm.sf(|z|) [L scipy]; one test ties it to the pooled
 * two-proportion test of docs/methods.md sec. 10.8.
 */
static const struct {
	const char *name;
	double est, var, z, p;
} ztest_rows[] = {
	{ "z=1.96", 1.959963984540054, 1, 1.959963984540054, 0.05 },
	{ "z=-1.5", -3, 4, -1.5, 0.13361440253771614 },
	{ "z=0.5", 0.25, 0.25, 0.5, 0.6170750774519738 },
	{ "z=8", 8e-3, 1e-6, 8, 1.244192114854348e-15 },
};

static void
test_ztest_scipy(void **state)
{
	double z, p;
	size_t i;

	(void)state;
	for (i = 0; i < sizeof ztest_rows / sizeof ztest_rows[0]; i++) {
		p = stats_ztest(ztest_rows[i].est, ztest_rows[i].var, &z);
		/* z to 1e-9 relative, p to 1e-6 relative */
		if (!(fabs(z - ztest_rows[i].z) <= 1e-9 * fabs(ztest_rows[i].z))
		    || !(fabs(p - ztest_rows[i].p) <= 1e-6 * ztest_rows[i].p))
			fail_msg("Wald z-test [L scipy], row \"%s\": z %.17g "
			    "(want %.17g), p %.17g (want %.17g)",
			    ztest_rows[i].name, z, ztest_rows[i].z, p,
			    ztest_rows[i].p);
	}
}

/* The pooled two-proportion test is a Wald test with the pooled variance:
 * 200/10000 vs 250/10000 (docs/methods.md sec. 10.8; z = 2.383995,
 * p = 0.0171258 [L scipy]). */
static void
test_ztest_prop(void **state)
{
	double pool = 450.0 / 20000, var = pool * (1 - pool) * 2 / 10000, z;
	double p = stats_ztest(0.025 - 0.02, var, &z);

	(void)state;
	NEAR("pooled Wald z [10.8 L]", z, 2.383995, 6);
	NEAR("pooled Wald p [10.8 L]", p, 0.0171258, 7);
	assert_true(fabs(p - stats_ztest_prop(200, 10000, 250, 10000, NULL)) <=
	    1e-12);
}

static void
test_ztest_guards(void **state)
{
	double z = -1;

	(void)state;
	assert_true(stats_ztest(1, 0, &z) == 1 && z == 0);
	assert_true(stats_ztest(1, -1, NULL) == 1);
	assert_true(stats_ztest(NAN, 1, &z) == 1 && z == 0);
	assert_true(stats_ztest(0, 1, &z) == 1 && z == 0);
}

/*
 * One-sided harm mixture (docs/methods.md, harm evidence). Values [L]:
 * scipy.special.log_ndtr in the closed form and scipy.integrate.quad of
 * the half-normal mixture integral agree with these to 1e-10; the
 * boundaries are scipy.optimize.brentq roots of the same function.
 */
static void
test_harm_table(void **state)
{
	static const struct {
		const char *name;
		double d, V, tau2, want;
	} row[] = {
		{ "d=0.02", 0.02, 1e-4, 4e-4, 1.45091415358 },
		{ "d=0", 0, 1e-4, 4e-4, -0.804718956217 },	/* -0.5 log 5 */
		{ "d=-0.03", -0.03, 1e-4, 4e-4, -2.12592156946 },
		{ "d=0.05 tau2=1e-3", 0.05, 1e-4, 1e-3, 10.8578349743 },
		{ "d=-0.5 tau2=1e-3", -0.5, 1e-4, 1e-3,
		    -5.28954642162 },			/* z = -47.67 */
	};
	static const struct {
		const char *name;
		double V, tau2, alpha, want;
	} bnd[] = {
		{ "V=1e-4 tau2=4e-4", 1e-4, 4e-4, 0.0125, 0.0335222191304 },
		{ "V=1e-4 tau2=1e-3", 1e-4, 1e-3, 0.0125, 0.0327950664043 },
		{ "V=2.5e-5 alpha=.05", 2.5e-5, 4e-4, 0.05, 0.0140624082796 },
	};
	char label[128];
	size_t i;
	int ok = 1;

	(void)state;
	for (i = 0; i < sizeof row / sizeof row[0]; i++)
		ok &= near(ROW("harm log E", row[i].name), stats_harm_log_e(
		    row[i].d, row[i].V, row[i].tau2), row[i].want, 11);
	for (i = 0; i < sizeof bnd / sizeof bnd[0]; i++)
		ok &= near(ROW("harm boundary", bnd[i].name),
		    stats_harm_boundary(bnd[i].V, bnd[i].tau2, bnd[i].alpha),
		    bnd[i].want, 13);
	/* a better treatment is never evidence of harm: log E falls with d */
	ok &= stats_harm_log_e(-10, 1e-4, 1e-3) < stats_harm_log_e(-1, 1e-4,
	    1e-3);
	ok &= stats_harm_log_e(1, 0, 1) == 0 && stats_harm_log_e(1, NAN, 1) == 0;
	assert_true(ok);
}

/*
 * Restricted MLE under p_T - p_C = D (Farrington & Manning 1990). [L]
 * scipy.optimize.brentq on the score; the first row is the pooled
 * proportion 25/2782 in closed form.
 */
static void
test_prop_null(void **state)
{
	static const struct {
		const char *name;
		double xt, nt, xc, nc, D, pt, pc;
	} row[] = {
		{ "pooled 25/2782", 3, 321, 22, 2461, 0, 0.00898634076204,
		    0.00898634076204 },
		{ "pooled, no treatment events", 0, 50, 200, 10000, 0,
		    0.0199004975124, 0.0199004975124 },
		{ "D=0.005", 2, 400, 100, 10000, 0.005, 0.0147412079472,
		    0.00974120794723 },
		{ "D=0.002", 30, 1000, 200, 10000, 0.002, 0.0226697250452,
		    0.0206697250452 },
		{ "no events, D=0.003", 0, 200, 0, 20000, 0.003, 0.003, 0 },
	};
	char label[128];
	size_t i;
	double pt, pc;
	int ok = 1;

	(void)state;
	for (i = 0; i < sizeof row / sizeof row[0]; i++) {
		assert_int_equal(stats_prop_null(row[i].xt, row[i].nt,
		    row[i].xc, row[i].nc, row[i].D, &pt, &pc), 0);
		ok &= near(ROW("p~_T", row[i].name), pt, row[i].pt, 13);
		ok &= near(ROW("p~_C", row[i].name), pc, row[i].pc, 13);
	}
	assert_int_equal(stats_prop_null(0, 0, 0, 0, 0, &pt, &pc), -1);
	assert_true(ok);
}

/*
 * Random-group variance (Wolter 2007, ch. 2, linearised). [C] exact
 * rational arithmetic in Python (fractions) for R and v; kappa [L]
 * scipy.stats.t.isf / norm.isf at q = 4.008286644e-4.
 */
static void
test_group_var(void **state)
{
	static const double S[8] = { 25100, 18700, 27900, 15100, 22800, 21900,
	    17600, 29300 };
	static const double N[8] = { 120, 95, 130, 80, 110, 105, 90, 140 };
	static const double E[8] = { 3, 0, 12, 1, 0, 2, 25, 1 };
	static const double Q[8] = { 900, 850, 1100, 700, 950, 1000, 1200,
	    800 };
	double R, v;
	int ok = 1;

	(void)state;
	v = stats_group_var(8, S, N, &R);
	ok &= near("R", R, 205.057471264, 9);
	ok &= near("v(R)", v, 8.11636231373, 11);
	v = stats_group_var(8, E, Q, &R);
	ok &= near("error rate", R, 0.00586666666667, 14);
	ok &= near("v(error rate)", v, 9.19766552381e-6, 16);
	ok &= near("kappa 64", stats_group_kappa(63, 4.008286644e-4),
	    1.104119407, 9);
	ok &= near("kappa 256", stats_group_kappa(255, 4.008286644e-4),
	    1.024405015, 9);
	ok &= near("kappa 1024", stats_group_kappa(1023, 4.008286644e-4),
	    1.006006364, 9);
	assert_true(isnan(stats_group_var(1, S, N, &R)));
	assert_true(ok);

	/* interleaved (S, N) pairs, as the engine keeps them: the same bits */
	{
		double sn[2 * 256], s1[256], n1[256], R2, v2;
		uint64_t x = 0x9e3779b97f4a7c15ULL;
		int g, trial;

		for (trial = 0; trial < 200; trial++) {
			for (g = 0; g < 256; g++) {
				x ^= x << 13;
				x ^= x >> 7;
				x ^= x << 17;
				s1[g] = sn[2 * g] = (x % 4 == 0) ? 0 :
				    (double)(x >> 11) / 9007199254740992.0 *
				    1e3;
				n1[g] = sn[2 * g + 1] = s1[g] == 0 ? 0 :
				    (double)(1 + (x >> 40) % 50);
			}
			v = stats_group_var(16 + trial, s1, n1, &R);
			v2 = stats_group_var_strided(16 + trial, sn, sn + 1,
			    2, &R2);
			assert_memory_equal(&v, &v2, sizeof v);
			assert_memory_equal(&R, &R2, sizeof R);
		}
	}
}

/*
 * stats_bb_logm keeps the terms of its last (g, h, r): whatever was asked
 * before, a call gives the same bits (a hit and a miss agree), for both
 * sides and for parameter sets that differ in one member only.
 */
static void
test_bb_prior_memo(void **state)
{
	static const double P[][3] = {
		{ 0.2, 0.8, 12.44 }, { 0.5, 0.5, 3.0 }, { 0.01, 0.99, 0.5 },
		{ 0.2, 0.8, 12.5 }, { 0.3, 1.7, 40 },
	};
	double ref[5][2][16], v;
	int i, j, k, side, bad = 0, round;

	(void)state;
	for (i = 0; i < 5; i++)
		for (side = 0; side < 2; side++)
			for (k = 0; k < 16; k++) {
				/* another parameter set first: a miss */
				(void)stats_bb_logm(1, 10, P[(i + 1) % 5][0],
				    P[(i + 1) % 5][1], P[(i + 1) % 5][2], side);
				ref[i][side][k] = stats_bb_logm(k * 7.5 - 20,
				    100 + k * 50, P[i][0], P[i][1], P[i][2],
				    side);
			}
	/* now in runs (hits) and interleaved (misses), in another order */
	for (round = 0; round < 3; round++)
		for (j = 0; j < 5; j++) {
			i = (j * 3 + round) % 5;
			for (side = 1; side >= 0; side--)
				for (k = 15; k >= 0; k--) {
					if (round == 2 && k % 2)
						(void)stats_bb_logm(2, 30,
						    P[(i + 2) % 5][0],
						    P[(i + 2) % 5][1],
						    P[(i + 2) % 5][2], !side);
					v = stats_bb_logm(k * 7.5 - 20,
					    100 + k * 50, P[i][0], P[i][1],
					    P[i][2], side);
					bad += memcmp(&v, &ref[i][side][k],
					    sizeof v) != 0;
				}
		}
	/* straight from one set to another that differs in r only */
	for (side = 0; side < 2; side++)
		for (k = 0; k < 16; k++) {
			(void)stats_bb_logm(k * 7.5 - 20, 100 + k * 50, P[0][0],
			    P[0][1], P[0][2], side);
			v = stats_bb_logm(k * 7.5 - 20, 100 + k * 50, P[3][0],
			    P[3][1], P[3][2], side);
			bad += memcmp(&v, &ref[3][side][k], sizeof v) != 0;
		}
	assert_int_equal(bad, 0);
	/* the two sets that differ in r only give different values */
	assert_true(ref[0][0][5] != ref[3][0][5]);
}

int
main(void)
{
	const struct CMUnitTest tests[] = {
		cmocka_unit_test(test_nm_hrms),
		cmocka_unit_test(test_harm_table),
		cmocka_unit_test(test_prop_null),
		cmocka_unit_test(test_group_var),
		cmocka_unit_test(test_bb_prior_memo),
		cmocka_unit_test(test_msprt_table),
		cmocka_unit_test(test_msprt_hrms_mapping),
		cmocka_unit_test(test_msprt_sequence),
		cmocka_unit_test(test_msprt_tau2_bernoulli),
		cmocka_unit_test(test_msprt_edges),
		cmocka_unit_test(test_dm_table),
		cmocka_unit_test(test_dm_stream),
		cmocka_unit_test(test_dm_k0),
		cmocka_unit_test(test_dm_edges),
		cmocka_unit_test(test_huge_counts),
		cmocka_unit_test(test_bb),
		cmocka_unit_test(test_bernoulli_cs),
		cmocka_unit_test(test_rate_table),
		cmocka_unit_test(test_rate_edges),
		cmocka_unit_test(test_quantile_cs),
		cmocka_unit_test(test_quantile_cs_ties),
		cmocka_unit_test(test_quantile_two_sample),
		cmocka_unit_test(test_quantile_edges),
		cmocka_unit_test(test_quantile_huge),
		cmocka_unit_test(test_special),
		cmocka_unit_test(test_classical),
		cmocka_unit_test(test_ztest_scipy),
		cmocka_unit_test(test_ztest_prop),
		cmocka_unit_test(test_ztest_guards),
	};

	return cmocka_run_group_tests(tests, NULL, NULL);
}
