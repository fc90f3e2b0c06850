/*
 * test_ztest.c: stats_ztest, the two-sided Wald z-test that the simulator
 * repeats at several looks to show the peeking inflation. Check values
 * are scipy's 2 * norm.sf(|z|) [L scipy]; one row ties it to the pooled
 * two-proportion test of docs/methods.md sec. 10.8 (z = 2.383995,
 * p = 0.0171258 [L scipy]).
 */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <math.h>

#include <cmocka.h>

#include "stopcock/stats.h"

static const struct {
	double	est, var, z, p;
} rows[] = {
	{ 1.959963984540054, 1, 1.959963984540054, 0.05 },
	{ -3, 4, -1.5, 0.13361440253771614 },
	{ 0.25, 0.25, 0.5, 0.6170750774519738 },
	{ 8e-3, 1e-6, 8, 1.244192114854348e-15 },
};

static void
test_ztest_scipy(void **state)
{
	double z, p;
	size_t i;

	(void)state;
	for (i = 0; i < sizeof rows / sizeof rows[0]; i++) {
		p = stats_ztest(rows[i].est, rows[i].var, &z);
		assert_true(fabs(z - rows[i].z) <= 1e-9 * fabs(rows[i].z));
		assert_true(fabs(p - rows[i].p) <= 1e-6 * rows[i].p);
	}
}

/* The pooled two-proportion test is a Wald test with the pooled variance:
 * 200/10000 vs 250/10000 (docs/methods.md sec. 10.8). */
static void
test_ztest_prop(void **state)
{
	double pool = 450.0 / 20000, var = pool * (1 - pool) * 2 / 10000, z;
	double p = stats_ztest(0.025 - 0.02, var, &z);

	(void)state;
	assert_true(fabs(z - 2.383995) <= 1e-6 * 2.383995);
	assert_true(fabs(p - 0.0171258) <= 1e-6);
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

int
main(void)
{
	const struct CMUnitTest tests[] = {
		cmocka_unit_test(test_ztest_scipy),
		cmocka_unit_test(test_ztest_prop),
		cmocka_unit_test(test_ztest_guards),
	};

	return cmocka_run_group_tests(tests, NULL, NULL);
}
