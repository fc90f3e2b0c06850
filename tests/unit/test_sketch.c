/*
 * test_sketch.c: the DDSketch quantile sketch. Check values come from
 * docs/methods.md section 10.7 (computed there by independent Python code);
 * the accuracy guarantee is checked against exact order statistics of
 * sorted samples; the numpy comparison on 10^6 samples lives in
 * tests/ref/sketch_numpy.py.
 */
#include <float.h>
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include "stopcock/sketch.h"

/* xorshift64*: the random cases are the same on every run. */
#define RNG_SEED 0x853c49e6748fea9bULL
#include "rng.h"

static double
unif(void)
{
	return ((double)(rng() >> 11) + 0.5) / 9007199254740992.0;
}

/* Box-Muller; fine for test data. */
static double
gauss(void)
{
	return sqrt(-2 * log(unif())) * cos(2 * M_PI * unif());
}

static int
cmp_double(const void *a, const void *b)
{
	double x = *(const double *)a, y = *(const double *)b;

	return (x > y) - (x < y);
}

static int
close_rel(double got, double want, double tol)
{
	return fabs(got - want) <= tol * fabs(want);
}

/* The element of 1-based rank floor(1 + q(n - 1)) of sorted x. */
static double
order_stat(const double *sorted, size_t n, double q)
{
	return sorted[(size_t)floor(q * (double)(n - 1))];
}

/* Same buckets, same counts, same order. */
static void
assert_same_sketch(const struct sketch *a, const struct sketch *b)
{
	size_t na = sketch_nbuckets(a), nb = sketch_nbuckets(b), i;
	double *va = calloc(na + 1, sizeof *va), *vb = calloc(nb + 1,
	    sizeof *vb);
	uint64_t *ca = calloc(na + 1, sizeof *ca), *cb = calloc(nb + 1,
	    sizeof *cb);

	assert_int_equal(na, nb);
	assert_int_equal(sketch_count(a), sketch_count(b));
	assert_int_equal(sketch_buckets(a, va, ca, na), na);
	assert_int_equal(sketch_buckets(b, vb, cb, nb), nb);
	for (i = 0; i < na; i++) {
		assert_true(va[i] == vb[i]);
		assert_int_equal(ca[i], cb[i]);
	}
	free(va);
	free(vb);
	free(ca);
	free(cb);
}

/* docs/methods.md 10.7: index and representative for alpha_s = 0.01. */
static void
test_methods_table(void **state)
{
	static const struct {
		double x;
		int index;
		double rep;
	} t[] = {
		{ 1, 0, 0.99 },
		{ 1.5, 21, 1.506763036 },
		{ 10, 116, 10.07469669 },
		{ 100, 231, 100.4945677 },
		{ 0.001, -345, 0.0009974781146 },
		{ 1234.5, 356, 1224.376497 },
	};
	/* docs/methods.md 10.7: gamma and ln gamma for alpha_s = 0.01. */
	const double gamma = 1.0202020202020201, lng = 0.020000666706669435;
	struct sketch *s;
	double v;
	uint64_t c;
	size_t i;
	long idx;

	for (i = 0; i < sizeof t / sizeof t[0]; i++) {
		s = sketch_new(0.01, SKETCH_BUCKETS_DEFAULT);
		assert_non_null(s);
		assert_int_equal(sketch_add(s, t[i].x, 1), 0);
		assert_int_equal(sketch_buckets(s, &v, &c, 1), 1);
		assert_int_equal(c, 1);
		if (!close_rel(v, t[i].rep, 1e-9))
			fail_msg("x=%g: representative %.12g, want %.12g",
			    t[i].x, v, t[i].rep);
		/* Recover the index from 2 gamma^i / (gamma + 1). */
		idx = lround(log(v * (gamma + 1) / 2) / lng);
		assert_int_equal(idx, t[i].index);
		sketch_free(s);
	}
}

/* docs/methods.md 10.7: values 1..100, 85 non-empty buckets, quantiles. */
static void
test_methods_quantiles(void **state)
{
	static const struct {
		double q, want;
	} t[] = {
		{ 0, 0.99 }, { 0.5, 49.90296095 }, { 0.9, 89.13032934 },
		{ 0.99, 98.50457627 }, { 1, 100.4945677 },
	};
	struct sketch *s = sketch_new(0.01, SKETCH_BUCKETS_DEFAULT);
	struct sketch *lo = sketch_new(0.01, SKETCH_BUCKETS_DEFAULT);
	struct sketch *hi = sketch_new(0.01, SKETCH_BUCKETS_DEFAULT);
	size_t i;
	int x;

	for (x = 1; x <= 100; x++) {
		sketch_add(s, x, 1);
		sketch_add(x <= 50 ? lo : hi, x, 1);
	}
	assert_int_equal(sketch_count(s), 100);
	assert_int_equal(sketch_nbuckets(s), 85);
	for (i = 0; i < sizeof t / sizeof t[0]; i++) {
		if (!close_rel(sketch_quantile(s, t[i].q), t[i].want, 1e-9))
			fail_msg("q=%g: %.12g, want %.12g", t[i].q,
			    sketch_quantile(s, t[i].q), t[i].want);
	}
	/* Sketching 1..50 and 51..100 and merging equals sketching 1..100. */
	assert_int_equal(sketch_merge(lo, hi), 0);
	assert_same_sketch(lo, s);
	for (i = 0; i < sizeof t / sizeof t[0]; i++)
		assert_true(sketch_quantile(lo, t[i].q) ==
		    sketch_quantile(s, t[i].q));
	sketch_free(s);
	sketch_free(lo);
	sketch_free(hi);
}

static void
test_guarantee(void **state)
{
	static const double acc[] = { 0.005, 0.01, 0.05, 0.2 };
	static const double qs[] = {
		0, 0.001, 0.01, 0.1, 0.25, 0.5, 0.75, 0.9, 0.99, 0.999, 1
	};
	enum { N = 200000 };
	double *x = malloc(N * sizeof *x), want, got;
	struct sketch *s;
	size_t a, i;

	assert_non_null(x);
	for (a = 0; a < sizeof acc / sizeof acc[0]; a++) {
		s = sketch_new(acc[a], 4096);
		for (i = 0; i < N; i++) {
			x[i] = exp(3 + 1.2 * gauss());
			sketch_add(s, x[i], 1);
		}
		qsort(x, N, sizeof *x, cmp_double);
		for (i = 0; i < sizeof qs / sizeof qs[0]; i++) {
			want = order_stat(x, N, qs[i]);
			got = sketch_quantile(s, qs[i]);
			if (!close_rel(got, want, acc[a] * (1 + 1e-12)))
				fail_msg("a=%g q=%g: %.9g vs exact %.9g",
				    acc[a], qs[i], got, want);
		}
		sketch_free(s);
	}
	free(x);
}

/*
 * Values over 1..1e6 need about 690 buckets at a = 0.01; with a cap of
 * 100 the lowest collapse, the top quantiles stay within a.
 */
static void
test_cap(void **state)
{
	enum { N = 100000 };
	double *x = malloc(N * sizeof *x);
	struct sketch *s = sketch_new(0.01, 100);
	struct sketch *whole = sketch_new(0.01, 100);
	struct sketch *half1 = sketch_new(0.01, 100);
	struct sketch *half2 = sketch_new(0.01, 100);
	struct sketch *wide = sketch_new(0.01, 4096);
	double qs[] = { 0.999, 0.9999, 1 }, want, got;
	size_t i;

	assert_non_null(x);
	for (i = 0; i < N; i++) {
		x[i] = exp(log(1e6) * unif());
		sketch_add(s, x[i], 1);
		sketch_add(wide, x[i], 1);
		sketch_add(i % 2 ? half1 : half2, x[i], 1);
	}
	assert_true(sketch_nbuckets(wide) > 600);
	assert_true(sketch_nbuckets(s) <= 100);
	assert_true(sketch_bytes(s) <= 100 * 8 + 256);
	qsort(x, N, sizeof *x, cmp_double);
	for (i = 0; i < sizeof qs / sizeof qs[0]; i++) {
		want = order_stat(x, N, qs[i]);
		got = sketch_quantile(s, qs[i]);
		if (!close_rel(got, want, 0.01 * (1 + 1e-12)))
			fail_msg("q=%g: %.9g vs exact %.9g", qs[i], got, want);
	}
	/* The low end did collapse: the minimum now reads far too high. */
	assert_true(sketch_quantile(s, 0) > 100 * x[0]);
	/* Collapsing depends only on the top key: sorted input (ascending,
	 * the worst order for re-folding) and merged halves give the same
	 * buckets. */
	for (i = 0; i < N; i++)
		sketch_add(whole, x[i], 1);
	assert_same_sketch(whole, s);
	assert_int_equal(sketch_merge(half1, half2), 0);
	assert_same_sketch(half1, s);
	sketch_free(s);
	sketch_free(whole);
	sketch_free(half1);
	sketch_free(half2);
	sketch_free(wide);
	free(x);
}

/* Mixed signs and zeros against exact order statistics. */
static void
test_negative_zero(void **state)
{
	enum { N = 50000 };
	static const double qs[] = {
		0, 0.01, 0.1, 0.2, 0.3, 0.5, 0.7, 0.9, 0.99, 1
	};
	double *x = malloc(N * sizeof *x), *v, want, got;
	uint64_t *c, sum = 0;
	struct sketch *s = sketch_new(0.01, SKETCH_BUCKETS_DEFAULT);
	size_t i, n;

	assert_non_null(x);
	for (i = 0; i < N; i++) {
		switch (rng() % 4) {
		case 0:
			x[i] = 0;
			break;
		case 1:
			x[i] = -exp(2 + gauss());
			break;
		default:
			x[i] = exp(1 + gauss());
		}
		sketch_add(s, x[i], 1);
	}
	qsort(x, N, sizeof *x, cmp_double);
	for (i = 0; i < sizeof qs / sizeof qs[0]; i++) {
		want = order_stat(x, N, qs[i]);
		got = sketch_quantile(s, qs[i]);
		if (want == 0 ? got != 0 : !close_rel(got, want, 0.01 + 1e-12))
			fail_msg("q=%g: %.9g vs exact %.9g", qs[i], got, want);
	}
	/* Buckets ascend through negatives, the zero block, positives. */
	n = sketch_nbuckets(s);
	v = malloc(n * sizeof *v);
	c = malloc(n * sizeof *c);
	assert_int_equal(sketch_buckets(s, v, c, n), n);
	for (i = 0; i < n; i++) {
		if (i > 0)
			assert_true(v[i] > v[i - 1]);
		sum += c[i];
	}
	assert_int_equal(sum, N);
	assert_true(v[0] < 0 && v[n - 1] > 0);
	/* A short buffer gets the lowest buckets only. */
	assert_int_equal(sketch_buckets(s, v, c, 3), 3);
	free(v);
	free(c);
	free(x);
	sketch_free(s);

	/* Negatives collapse at the most negative end (the low quantiles). */
	s = sketch_new(0.01, 50);
	for (i = 1; i <= 10000; i++)
		sketch_add(s, -(double)i, 1);
	assert_true(close_rel(sketch_quantile(s, 1), -1, 0.01));
	assert_true(close_rel(sketch_quantile(s, 0.9999), -2, 0.01));
	assert_true(sketch_quantile(s, 0) > -100);
	sketch_free(s);
}

static void
test_edges(void **state)
{
	struct sketch *s, *t;
	double v[4];
	uint64_t c[4];

	assert_null(sketch_new(0, 512));
	assert_null(sketch_new(0.6, 512));
	assert_null(sketch_new(NAN, 512));
	assert_null(sketch_new(0.01, 15));
	assert_non_null(s = sketch_new(0.5, 16));
	sketch_free(s);

	s = sketch_new(0.01, SKETCH_BUCKETS_DEFAULT);
	assert_true(isnan(sketch_quantile(s, 0.5)));
	assert_int_equal(sketch_nbuckets(s), 0);
	assert_int_equal(sketch_add(s, NAN, 1), -1);
	assert_int_equal(sketch_add(s, INFINITY, 1), -1);
	assert_int_equal(sketch_add(s, -INFINITY, 1), -1);
	assert_int_equal(sketch_add(s, 5, 0), 0);
	assert_int_equal(sketch_count(s), 0);
	assert_int_equal(sketch_add(s, 5, 3), 0);
	assert_int_equal(sketch_add(s, 5, UINT64_MAX), -1);
	assert_int_equal(sketch_count(s), 3);
	assert_true(isnan(sketch_quantile(s, -0.1)));
	assert_true(isnan(sketch_quantile(s, 1.1)));
	assert_true(isnan(sketch_quantile(s, NAN)));
	assert_true(close_rel(sketch_quantile(s, 0.5), 5, 0.01));

	/* Extremes of the double range stay finite. */
	sketch_add(s, DBL_MAX, 1);
	sketch_add(s, DBL_TRUE_MIN, 1);
	sketch_add(s, -DBL_MAX, 1);
	assert_true(isfinite(sketch_quantile(s, 1)));
	assert_true(close_rel(sketch_quantile(s, 1), DBL_MAX, 0.01));
	assert_true(isfinite(sketch_quantile(s, 0)));

	/* Different accuracies do not merge; merging into itself doubles. */
	t = sketch_new(0.02, SKETCH_BUCKETS_DEFAULT);
	assert_int_equal(sketch_merge(s, t), -1);
	sketch_free(t);
	sketch_reset(s);
	assert_int_equal(sketch_count(s), 0);
	assert_true(sketch_bytes(s) < 256);
	sketch_add(s, 2, 1);
	sketch_add(s, 0, 1);
	assert_int_equal(sketch_merge(s, s), 0);
	assert_int_equal(sketch_count(s), 4);
	assert_int_equal(sketch_buckets(s, v, c, 4), 2);
	assert_true(v[0] == 0 && c[0] == 2 && c[1] == 2);
	assert_true(sketch_accuracy(s) == 0.01);
	sketch_free(s);
	sketch_free(NULL);
}

/* A latency series of realistic spread stays under 8 KiB. */
static void
test_memory(void **state)
{
	struct sketch *s = sketch_new(SKETCH_ACCURACY_DEFAULT,
	    SKETCH_BUCKETS_DEFAULT);
	size_t i;

	assert_true(sketch_bytes(s) < 256);
	sketch_add(s, 120, 1);
	assert_true(sketch_bytes(s) <= 32 * 8 + 256);
	for (i = 0; i < 100000; i++)
		sketch_add(s, exp(4 + 2 * gauss()), 1);
	assert_true(sketch_bytes(s) <= 8192);
	sketch_free(s);
}

static struct sketch *
random_sketch(void)
{
	struct sketch *s = sketch_new(0.01, 300);
	size_t i, n = rng() % 2000;

	for (i = 0; i < n; i++) {
		switch (rng() % 5) {
		case 0:
			sketch_add(s, 0, 1 + rng() % 3);
			break;
		case 1:
			sketch_add(s, -exp(3 * gauss()), 1);
			break;
		default:
			sketch_add(s, exp(5 * gauss()), 1 + rng() % 1000);
		}
	}
	return s;
}

static void
test_encode(void **state)
{
	struct sketch *s, *d;
	uint8_t *buf, *buf2, *buf3, junk[512];
	size_t n, cut, i, j;
	int round;

	for (round = 0; round < 50; round++) {
		s = random_sketch();
		n = sketch_encoded_size(s);
		buf = malloc(n);
		buf2 = malloc(n);
		buf3 = malloc(n);
		assert_int_equal(sketch_encode(s, buf, n - 1), 0);
		assert_int_equal(sketch_encode(s, buf, n), n);
		d = sketch_decode(buf, n);
		assert_non_null(d);
		assert_same_sketch(s, d);
		assert_true(sketch_accuracy(d) == sketch_accuracy(s));
		assert_true(sketch_quantile(d, 0.37) ==
		    sketch_quantile(s, 0.37));
		assert_int_equal(sketch_encode(d, buf2, n), n);
		assert_memory_equal(buf, buf2, n);
		sketch_free(d);
		/* Every truncation is refused; so is one byte too many. */
		for (cut = 0; cut < n; cut += 1 + cut / 16)
			assert_null(sketch_decode(buf, cut));
		buf2 = realloc(buf2, n + 1);
		memcpy(buf2, buf, n);
		buf2[n] = 0;
		assert_null(sketch_decode(buf2, n + 1));
		/*
		 * Flipped bytes: either refused, or a valid sketch whose own
		 * encoding is exactly the mutated buffer (the format has one
		 * spelling per sketch).
		 */
		for (i = 0; i < 200; i++) {
			memcpy(buf2, buf, n);
			j = rng() % n;
			buf2[j] ^= (uint8_t)(1 + rng() % 255);
			if ((d = sketch_decode(buf2, n)) == NULL)
				continue;
			assert_int_equal(sketch_encoded_size(d), n);
			assert_int_equal(sketch_encode(d, buf3, n), n);
			assert_memory_equal(buf3, buf2, n);
			(void)sketch_quantile(d, 0.5);
			sketch_free(d);
		}
		free(buf);
		free(buf2);
		free(buf3);
		sketch_free(s);
	}
	/* Pure garbage. */
	for (round = 0; round < 20000; round++) {
		n = rng() % sizeof junk;
		for (i = 0; i < n; i++)
			junk[i] = (uint8_t)rng();
		if (n >= 8 && round % 2)
			memcpy(junk, "SCSK\1\0\0\0", 8);
		d = sketch_decode(junk, n);
		sketch_free(d);
	}
	/* The empty sketch round-trips. */
	s = sketch_new(0.02, 64);
	n = sketch_encoded_size(s);
	buf = malloc(n);
	assert_int_equal(sketch_encode(s, buf, n), n);
	d = sketch_decode(buf, n);
	assert_non_null(d);
	assert_int_equal(sketch_count(d), 0);
	assert_true(sketch_accuracy(d) == 0.02);
	sketch_free(d);
	sketch_free(s);
	free(buf);
}

int
main(void)
{
	const struct CMUnitTest tests[] = {
		cmocka_unit_test(test_methods_table),
		cmocka_unit_test(test_methods_quantiles),
		cmocka_unit_test(test_guarantee),
		cmocka_unit_test(test_cap),
		cmocka_unit_test(test_negative_zero),
		cmocka_unit_test(test_edges),
		cmocka_unit_test(test_memory),
		cmocka_unit_test(test_encode),
	};

	return cmocka_run_group_tests(tests, NULL, NULL);
}
