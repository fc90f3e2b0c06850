/*
 * test_detect.c: the change detector of detect.c (stats_detect_*, Page's
 * CUSUM and Shiryaev-Roberts recursions) against outside values:
 *   [E1] docs/methods.md sec. 19 (check value E1): z = (0.3, -1.2, 0.8,
 *        2.1, 1.7, 0.4, 2.5, 1.9), lambda = 1, so l = z - 1/2; computed
 *        there both by the recursions and by a brute force over starts.
 *   [NB] numpy brute force over every start time and grid point (no
 *        recursion), printed by `tests/ref/detect_scipy.py --values`:
 *        docs/methods.md sec. 19, check value E2's block excesses d_b (a change at block 9) with
 *        I_b = 100 and the grid geomspace(0.02, 0.5, 12).
 *   [L]  Python's math.log for the default threshold.
 * The ARL and the e-detector guarantee are checked by simulation in
 * tests/ref/detect_scipy.py. Guards: bad grids, skipped blocks (state
 * untouched), reset, and the checkpoint check.
 */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <math.h>

#include <cmocka.h>

#include "stopcock/stats.h"

/* within rel relative (or absolute below 1), or both the same infinity */
static int
near(const char *what, double got, double want, double rel)
{
	if (got == want || fabs(got - want) <= rel * fmax(1, fabs(want)))
		return 1;
	print_error("%s: got %.12g want %.12g\n", what, got, want);
	return 0;
}

static const double e1_z[8] = { 0.3, -1.2, 0.8, 2.1, 1.7, 0.4, 2.5, 1.9 };

/* [E1] log M_CU and log M_SR, lambda = 1 */
static void
test_e1_recursions(void **state)
{
	static const double cu[8] = { -0.2, -1.7, 0.3, 1.9, 3.1, 3, 5, 6.4 };
	static const double sr[8] = { -0.2, -1.101861131, 0.586870851,
	    2.629030776, 3.898695221, 3.818760892, 5.84047834, 7.243381574 };
	struct stats_detect d;
	double w = -INFINITY, r = -INFINITY, m;
	int i, ok = 1;

	(void)state;
	assert_int_equal(stats_detect_init(&d, 1, 1, 1), 0);
	for (i = 0; i < 8; i++) {
		w = stats_cusum_update(w, e1_z[i] - 0.5);
		r = stats_sr_update(r, e1_z[i] - 0.5);
		m = stats_detect_update(&d, e1_z[i], 1, 10 + i);
		ok &= near("CUSUM [E1]", w, cu[i], 1e-12);
		ok &= near("SR [E1]", r, sr[i], 5e-9);
		ok &= near("detector, 1 point [E1]", m, cu[i], 1e-12);
	}
	/* the best sum ending at block 8 starts at block 3 (the statistic
	 * was last <= 0 after block 2): time 10 + 2 */
	assert_true(ok);
	assert_true(stats_detect_change_start(&d) == 12);
	assert_true(d.blocks == 8);
}

/* [E1] a grid of k equal points with weights 1/k is the one-point CUSUM:
 * the weights must sum to one, no more, no less */
static void
test_equal_points(void **state)
{
	struct stats_detect one, many;
	double a, b;
	int i, ok = 1;

	(void)state;
	assert_int_equal(stats_detect_init(&one, 0.7, 0.7, 1), 0);
	assert_int_equal(stats_detect_init(&many, 0.7, 0.7,
	    STATS_DETECT_GRID), 0);
	for (i = 0; i < 8; i++) {
		a = stats_detect_update(&one, e1_z[i], 1.3, i + 1);
		b = stats_detect_update(&many, e1_z[i], 1.3, i + 1);
		ok &= near("k equal points", b, a, 1e-14);
	}
	assert_true(ok);
}

/* [NB] docs/methods.md sec. 19, check value E2's excesses, I = 100, grid geomspace(0.02, 0.5, 12) */
static void
test_e2_grid(void **state)
{
	static const double dexc[12] = { 0.05, -0.12, 0.02, 0.08, -0.06, 0.01,
	    -0.03, 0.04, 0.25, 0.31, 0.22, 0.28 };
	static const struct {
		double	log_m, start;
	} want[12] = {
		{ -0.332704466929, 1 }, { -1.17101039613, 1 },
		{ -0.533840358572, 3 }, { -0.101410767671, 4 },
		{ -0.753417947399, 3 }, { -0.593200292586, 3 },
		{ -0.823465045658, 3 }, { -0.40225454759, 8 },
		{ 2.09776871077, 9 }, { 6.20677938024, 9 },
		{ 8.35537255164, 9 }, { 12.0812592085, 9 },
	};
	struct stats_detect d;
	double m, logc = log(1000.0);
	int b, ok = 1, alarm = 0;

	(void)state;
	assert_int_equal(stats_detect_init(&d, 0.02, 0.5, 12), 0);
	for (b = 0; b < 12; b++) {
		m = stats_detect_update(&d, dexc[b] * 100, 100, b + 1);
		ok &= near("E2 grid log M [NB]", m, want[b].log_m, 1e-10);
		ok &= stats_detect_change_start(&d) == want[b].start;
		if (!alarm && m >= logc)
			alarm = b + 1;
	}
	assert_true(ok);
	/* at c = 1000 it alarms at block 11 and dates the change at 9 */
	assert_int_equal(alarm, 11);
}

static void
test_threshold(void **state)
{
	(void)state;
	/* [L] math.log(20 * 30 * 86400 / 0.05) */
	assert_true(near("default threshold [L]",
	    stats_detect_threshold(30 * 86400 / 0.05, 20),
	    20.759404883562283, 1e-14));
	assert_true(isnan(stats_detect_threshold(0.5, 20)));
	assert_true(isnan(stats_detect_threshold(100, 0)));
	assert_true(isnan(stats_detect_threshold(INFINITY, 1)));
	assert_true(isnan(stats_detect_threshold(NAN, 1)));
}

static void
test_bad_grid(void **state)
{
	static const struct {
		double	lo, hi;
		int	k;
	} bad[] = {
		{ 0, 1, 3 }, { -1, 1, 3 }, { NAN, 1, 3 }, { 1, 0.5, 3 },
		{ 1, INFINITY, 3 }, { 1, NAN, 3 }, { 0.1, 1, 0 },
		{ 0.1, 1, STATS_DETECT_GRID + 1 },
	};
	struct stats_detect d;
	size_t i;

	(void)state;
	for (i = 0; i < sizeof bad / sizeof bad[0]; i++) {
		assert_int_equal(stats_detect_init(&d, bad[i].lo, bad[i].hi,
		    bad[i].k), -1);
		/* inert: never evidence, never an alarm */
		assert_int_equal(d.k, 0);
		assert_true(stats_detect_update(&d, 50, 1, 1) == -INFINITY);
		assert_true(d.blocks == 0);
		assert_true(isnan(stats_detect_change_start(&d)));
		assert_int_equal(stats_detect_check(&d), 0);
	}
}

/* A block that cannot be used leaves every number as it was. */
static void
test_skipped_blocks(void **state)
{
	static const double bad[][2] = {
		{ 1, 0 }, { 1, -2 }, { 1, NAN }, { 1, INFINITY }, { NAN, 1 },
		{ INFINITY, 1 }, { -INFINITY, 1 },
		{ 1e308, 1 },		/* lambda X overflows at lambda 10 */
		{ 0, 1e308 },		/* lambda^2 I / 2 overflows */
	};
	struct stats_detect d, before;
	double m;
	size_t i;

	(void)state;
	assert_int_equal(stats_detect_init(&d, 0.5, 10, 6), 0);
	assert_true(stats_detect_update(&d, 0.3, 1, 0) > -INFINITY);
	m = stats_detect_update(&d, 2, 1, 1);
	for (i = 0; i < sizeof bad / sizeof bad[0]; i++) {
		memcpy(&before, &d, sizeof d);
		assert_true(stats_detect_update(&d, bad[i][0], bad[i][1],
		    2) == m);
		assert_memory_equal(&before, &d, sizeof d);
	}
	assert_true(d.blocks == 2);
}

static void
test_reset(void **state)
{
	struct stats_detect d, fresh;
	double a, b;
	int i;

	(void)state;
	assert_int_equal(stats_detect_init(&d, 0.1, 3, 8), 0);
	assert_int_equal(stats_detect_init(&fresh, 0.1, 3, 8), 0);
	assert_true(stats_detect_log_m(&d) == -INFINITY);
	assert_true(isnan(stats_detect_change_start(&d)));
	for (i = 0; i < 8; i++)
		stats_detect_update(&d, e1_z[i] * 4, 1, i);
	stats_detect_reset(&d);
	assert_true(stats_detect_log_m(&d) == -INFINITY);
	assert_true(d.blocks == 0 && d.k == 8);
	for (i = 0; i < 8; i++) {
		a = stats_detect_update(&d, e1_z[i], 2, i);
		b = stats_detect_update(&fresh, e1_z[i], 2, i);
		assert_true(a == b);
	}
}

/* The state read back from a checkpoint: what init/update can produce
 * passes, anything else (that would void the guarantee) does not. */
static void
test_check(void **state)
{
	struct stats_detect d, bad;
	int i;

	(void)state;
	memset(&d, 0, sizeof d);
	assert_int_equal(stats_detect_check(&d), 0);	/* never initialised */
	assert_int_equal(stats_detect_init(&d, 0.01, 4, 12), 0);
	assert_int_equal(stats_detect_check(&d), 0);
	for (i = 0; i < 8; i++)
		stats_detect_update(&d, e1_z[i] - 3, 1, i);
	assert_int_equal(stats_detect_check(&d), 0);

	memcpy(&bad, &d, sizeof d);
	bad.log_m[3] = NAN;
	assert_int_equal(stats_detect_check(&bad), -1);
	memcpy(&bad, &d, sizeof d);
	bad.log_m[0] = INFINITY;
	assert_int_equal(stats_detect_check(&bad), -1);
	memcpy(&bad, &d, sizeof d);
	bad.log_w[5] += 0.01;			/* weights sum above one */
	assert_int_equal(stats_detect_check(&bad), -1);
	memcpy(&bad, &d, sizeof d);
	bad.lambda[2] = 0;
	assert_int_equal(stats_detect_check(&bad), -1);
	memcpy(&bad, &d, sizeof d);
	bad.k = STATS_DETECT_GRID + 1;
	assert_int_equal(stats_detect_check(&bad), -1);
	memcpy(&bad, &d, sizeof d);
	bad.blocks = -1;
	assert_int_equal(stats_detect_check(&bad), -1);
	/* weights below one only waste evidence: allowed */
	memcpy(&bad, &d, sizeof d);
	bad.log_w[5] -= 1;
	assert_int_equal(stats_detect_check(&bad), 0);
}

int
main(void)
{
	const struct CMUnitTest tests[] = {
		cmocka_unit_test(test_e1_recursions),
		cmocka_unit_test(test_equal_points),
		cmocka_unit_test(test_e2_grid),
		cmocka_unit_test(test_threshold),
		cmocka_unit_test(test_bad_grid),
		cmocka_unit_test(test_skipped_blocks),
		cmocka_unit_test(test_reset),
		cmocka_unit_test(test_check),
	};

	return cmocka_run_group_tests(tests, NULL, NULL);
}
