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
#include "stopcock/stats.h"

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
	/* 100 kept buckets and the low edge holding the folded rest */
	assert_true(sketch_nbuckets(s) <= 100 + 1);
	assert_true(sketch_edge_count(s) > 0);
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

/*
 * The block holding the 0-based rank r (r = floor(q(n - 1)), the rank of
 * numpy's method='lower'), as bounds and representative.
 */
static void
block_at_rank(const struct sketch *s, double q, double *lo, double *hi,
    double *rep)
{
	size_t n = sketch_nbuckets(s), i;
	double *l = calloc(n, sizeof *l), *h = calloc(n, sizeof *h);
	double *v = calloc(n, sizeof *v);
	uint64_t *c = calloc(n, sizeof *c), *c2 = calloc(n, sizeof *c2);
	uint64_t cum = 0, r = (uint64_t)floor(q * (double)(sketch_count(s) -
	    1));

	assert_int_equal(sketch_bounds(s, l, h, c, n), n);
	assert_int_equal(sketch_buckets(s, v, c2, n), n);
	for (i = 0; i < n; i++) {
		assert_int_equal(c[i], c2[i]);
		cum += c[i];
		if (cum > r)
			break;
	}
	assert_true(i < n);
	*lo = l[i];
	*hi = h[i];
	*rep = v[i];
	free(l);
	free(h);
	free(v);
	free(c);
	free(c2);
}

/*
 * Mixtures with 1% of huge values (issue 12, item 3): the old sketch read
 * p90 = 361.5 for 108.1 with 1% at 1e7. The body is log-uniform on
 * [20, 500], x_i = 20 * 25^((i + 0.5) / n_body), added in the order
 * i = 7919 j mod n_body with the outliers spread among them. Check values:
 * np.quantile(values, q, method='lower') over the same values, numpy
 * 1.x via /usr/bin/python3 (the element of 0-based rank floor(q(n - 1)),
 * what sketch_quantile answers within a). Every block's bounds must hold
 * numpy's element; in the body the estimate is within a = 0.01.
 */
struct mix_case {
	const char	*name;
	int		 sign;		/* body sign */
	int		 nbody;
	double		 out[3];	/* outlier values, 100 of each */
	int		 nout;
	int		 zeros;		/* 100 zeros too */
	double		 q[8], want[8];
	int		 body[8];	/* 1: estimate within a, else bounds */
};

static const struct mix_case mix_cases[] = {
	{ "1% at 1e7", 1, 9900, { 1e7 }, 1, 0,
	  { 0.01, 0.25, 0.5, 0.9, 0.95, 0.98, 0.995, -1 },
	  { 20.65760642, 45.07902833, 101.6224591, 373.0902897, 438.951944,
	    483.9258206, 1e7 },
	  { 1, 1, 1, 1, 1, 1, 1 } },
	{ "1% at 1e9", 1, 9900, { 1e9 }, 1, 0,
	  { 0.01, 0.25, 0.5, 0.9, 0.95, 0.98, 0.995, -1 },
	  { 20.65760642, 45.07902833, 101.6224591, 373.0902897, 438.951944,
	    483.9258206, 1e9 },
	  { 1, 1, 1, 1, 1, 1, 1 } },
	{ "1% at 1e300", 1, 9900, { 1e300 }, 1, 0,
	  { 0.01, 0.25, 0.5, 0.9, 0.95, 0.98, 0.995, -1 },
	  { 20.65760642, 45.07902833, 101.6224591, 373.0902897, 438.951944,
	    483.9258206, 1e300 },
	  { 1, 1, 1, 1, 1, 1, 1 } },
	{ "1% at DBL_MAX", 1, 9900, { DBL_MAX }, 1, 0,
	  { 0.01, 0.25, 0.5, 0.9, 0.95, 0.98, 0.995, -1 },
	  { 20.65760642, 45.07902833, 101.6224591, 373.0902897, 438.951944,
	    483.9258206, DBL_MAX },	/* numpy: 1.797693135e+308 */
	  { 1, 1, 1, 1, 1, 1, 1 } },
	/* three outlier values share the high edge: bounds only there */
	{ "1% each at 1e7, 1e9, 1e300", 1, 9700, { 1e7, 1e9, 1e300 }, 3, 0,
	  { 0.01, 0.25, 0.5, 0.9, 0.95, 0.96, 0.975, 0.985 },
	  { 20.67139042, 45.84075412, 105.0861715, 396.2923391, 467.8153203,
	    483.5998894, 1e7, 1e9 },
	  { 1, 1, 1, 1, 1, 1, 1, 0 } },
	/* negatives, zeros, and outliers at both ends of the negative store */
	{ "negative body, -1e300, -1e-300, zeros", -1, 9700,
	  { -1e300, -1e-300 }, 2, 1,
	  { 0.005, 0.02, 0.1, 0.5, 0.9, 0.975, 0.985, 0.995 },
	  { -1e300, -483.7603953, -370.9678637, -98.37079527, -26.08531441,
	    -20.33798538, -1e-300, 0 },
	  { 1, 1, 1, 1, 1, 1, 1, 1 } },
	/* both ends of the double range around a positive body */
	{ "DBL_MAX and the least subnormal", 1, 9800,
	  { DBL_MAX, DBL_TRUE_MIN }, 2, 0,
	  { 0.005, 0.02, 0.1, 0.5, 0.9, 0.98, 0.995, -1 },
	  { 4.940656458e-324, 20.66442695, 26.87453248, 99.98357851,
	    371.9772978, 483.7644905, DBL_MAX },
	  { 0, 1, 1, 1, 1, 1, 1 } },
};

static struct sketch *
mix_sketch(const struct mix_case *m, int outliers_first)
{
	struct sketch *s = sketch_new(0.01, SKETCH_BUCKETS_DEFAULT);
	int j, k, per = m->nbody / 100, added = 0;
	double x;

	/* outliers_first: the first 10 of each outlier value lead */
	if (outliers_first)
		for (k = 0; k < m->nout; k++)
			for (j = 0; j < 10; j++)
				assert_int_equal(sketch_add(s, m->out[k], 1), 0);
	for (j = 0; j < m->nbody; j++) {
		x = m->sign * 20.0 * pow(25.0, ((double)((int64_t)j * 7919 %
		    m->nbody) + 0.5) / m->nbody);
		assert_int_equal(sketch_add(s, x, 1), 0);
		if (j % per == per - 1 && added < 100) {
			for (k = 0; k < m->nout; k++)
				if (!outliers_first || added >= 10)
					sketch_add(s, m->out[k], 1);
			if (m->zeros)
				sketch_add(s, 0, 1);
			added++;
		}
	}
	assert_int_equal(sketch_count(s),
	    (uint64_t)(m->nbody + 100 * (m->nout + m->zeros)));
	return s;
}

static void
check_mix(const struct mix_case *m, const struct sketch *s)
{
	double lo, hi, rep, got;
	int i;

	for (i = 0; i < 8 && m->q[i] >= 0; i++) {
		block_at_rank(s, m->q[i], &lo, &hi, &rep);
		got = sketch_quantile(s, m->q[i]);
		assert_true(got == rep);
		if (!(lo <= m->want[i] * (1 + 1e-9 * (m->want[i] < 0)) &&
		    m->want[i] <= hi * (1 + 1e-9 * (m->want[i] > 0)) + 0))
			fail_msg("%s q=%g: numpy %.10g outside [%.10g, %.10g]",
			    m->name, m->q[i], m->want[i], lo, hi);
		if (m->body[i] && m->want[i] != 0 &&
		    !close_rel(got, m->want[i], 0.01 * (1 + 1e-9)))
			fail_msg("%s q=%g: %.10g vs numpy %.10g", m->name,
			    m->q[i], got, m->want[i]);
		if (m->want[i] == 0)
			assert_true(got == 0);
	}
}

static void
test_outliers(void **state)
{
	struct sketch *s, *d, *half[2];
	const struct mix_case *m;
	uint8_t *buf;
	size_t i, n;
	int first;

	for (i = 0; i < sizeof mix_cases / sizeof mix_cases[0]; i++) {
		m = &mix_cases[i];
		for (first = 0; first < 2; first++) {
			s = mix_sketch(m, first);
			check_mix(m, s);
			/* the outliers sit in edges, counted exactly */
			assert_true(sketch_edge_count(s) > 0);
			assert_true(sketch_edge_count(s) <=
			    (uint64_t)(100 * m->nout));
			assert_true(sketch_nbuckets(s) <=
			    SKETCH_BUCKETS_DEFAULT + 5);
			/* the edges survive a checkpoint */
			n = sketch_encoded_size(s);
			buf = malloc(n);
			assert_int_equal(sketch_encode(s, buf, n), n);
			assert_non_null(d = sketch_decode(buf, n));
			assert_same_sketch(s, d);
			assert_int_equal(sketch_edge_count(d),
			    sketch_edge_count(s));
			check_mix(m, d);
			sketch_free(d);
			free(buf);
			/* and a merge of two halves (simulate's pooling) */
			half[0] = sketch_new(0.01, SKETCH_BUCKETS_DEFAULT);
			half[1] = mix_sketch(m, first);
			assert_int_equal(sketch_merge(half[0], s), 0);
			assert_int_equal(sketch_merge(half[0], half[1]), 0);
			assert_int_equal(sketch_count(half[0]),
			    2 * sketch_count(s));
			check_mix(m, half[0]);
			sketch_free(half[0]);
			sketch_free(half[1]);
			sketch_free(s);
		}
	}
}

/*
 * sketch_buckets_side puts an edge at either end of its range, never a
 * regular bucket; both orders stay non-decreasing.
 */
static void
test_sides(void **state)
{
	struct sketch *s = mix_sketch(&mix_cases[4], 0);
	size_t n = sketch_nbuckets(s), i, edges = 0;
	double *v0 = calloc(n, sizeof *v0), *vl = calloc(n, sizeof *vl);
	double *vh = calloc(n, sizeof *vh), *lo = calloc(n, sizeof *lo);
	double *hi = calloc(n, sizeof *hi);
	uint64_t *c = calloc(n, sizeof *c);

	assert_int_equal(sketch_buckets_side(s, 0, v0, c, n), n);
	assert_int_equal(sketch_buckets_side(s, -1, vl, c, n), n);
	assert_int_equal(sketch_buckets_side(s, 1, vh, c, n), n);
	assert_int_equal(sketch_bounds(s, lo, hi, c, n), n);
	for (i = 0; i < n; i++) {
		assert_true(lo[i] <= v0[i] && v0[i] <= hi[i]);
		if (vl[i] != v0[i] || vh[i] != v0[i]) {
			edges++;
			assert_true(vl[i] == lo[i] && vh[i] == hi[i]);
		}
		if (i > 0) {
			assert_true(vl[i] >= vl[i - 1]);
			assert_true(vh[i] >= vh[i - 1]);
			assert_true(lo[i] >= hi[i - 1] * (1 - 1e-9));
		}
	}
	/* one high edge over 1e7..1e300, nothing else */
	assert_int_equal(edges, 1);
	assert_true(vl[n - 1] < 1e7 && vl[n - 1] > 1e7 * 0.97);
	assert_true(vh[n - 1] > 1e300 && vh[n - 1] < 1e300 * 1.03);
	free(v0);
	free(vl);
	free(vh);
	free(lo);
	free(hi);
	free(c);
	sketch_free(s);
}

/* Little-endian writer for hand-made images. */
static uint8_t *
put_le(uint8_t *p, uint64_t v, int bytes)
{
	int i;

	for (i = 0; i < bytes; i++)
		*p++ = (uint8_t)(v >> (8 * i));
	return p;
}

/*
 * A version-1 image (the previous format, layout from its encoder: the
 * header as today, then per store lowest key, span and span counts) with
 * positive keys lo .. lo + span - 1 holding cnt[], negatives at one key.
 */
static size_t
v1_image(uint8_t *buf, uint32_t cap, int32_t lo, uint32_t span,
    const uint64_t *cnt, int32_t nkey, uint64_t ncount, uint64_t zeros)
{
	double a = 0.01;
	uint64_t bits;
	uint8_t *p = buf;
	uint32_t i;

	memcpy(&bits, &a, sizeof bits);
	memcpy(p, "SCSK\1\0\0\0", 8);
	p = put_le(p + 8, bits, 8);
	p = put_le(p, cap, 4);
	p = put_le(p, 0, 4);
	p = put_le(p, zeros, 8);
	p = put_le(p, (uint32_t)lo, 4);
	p = put_le(p, span, 4);
	for (i = 0; i < span; i++)
		p = put_le(p, cnt[i], 8);
	p = put_le(p, (uint32_t)nkey, 4);
	p = put_le(p, ncount != 0, 4);
	if (ncount != 0)
		p = put_le(p, ncount, 8);
	return (size_t)(p - buf);
}

/*
 * Images of the previous format (version 1, before the edges):
 * sketch_decode refuses them and sketch_encoded_version says why;
 * sketch_decode_any reads them for old checkpoints, a store that had
 * reached its cap turning its lowest bucket, which may hold folded
 * values, into a low edge. Check values: representatives of
 * docs/methods.md 10.7 (x = 1: 0.99, key 0; x = 100: 100.4945677,
 * key 231; x = -10: -10.07469669, key -116 of the negative store) and
 * its log gamma = 0.020000666706669435.
 */
static void
test_old_format(void **state)
{
	uint8_t img[32 + 16 + 8 * 300], img2[32 + 16 + 8 * 300];
	uint64_t cnt[300];
	struct sketch *d, *e;
	double lo[8], hi[8], v[8];
	uint64_t c[8];
	size_t n, m;

	/* 1 twice, 100 once, -10 once, one zero; cap 512: no fold */
	memset(cnt, 0, sizeof cnt);
	cnt[0] = 2;
	cnt[231] = 1;
	n = v1_image(img, 512, 0, 232, cnt, -116, 1, 1);
	assert_null(sketch_decode(img, n));
	assert_int_equal(sketch_encoded_version(img, n), 1);
	assert_int_equal(sketch_encoded_version((const uint8_t *)"junk", 4),
	    -1);
	assert_non_null(d = sketch_decode_any(img, n));
	assert_int_equal(sketch_count(d), 5);
	assert_int_equal(sketch_edge_count(d), 0);
	assert_int_equal(sketch_buckets(d, v, c, 8), 4);
	assert_true(close_rel(v[0], -10.07469669, 1e-9) && c[0] == 1);
	assert_true(v[1] == 0 && c[1] == 1);
	assert_true(close_rel(v[2], 0.99, 1e-9) && c[2] == 2);
	assert_true(close_rel(v[3], 100.4945677, 1e-9) && c[3] == 1);
	/* it is written back in today's format, which reads strictly */
	m = sketch_encoded_size(d);
	assert_int_equal(sketch_encode(d, img2, m), m);
	assert_int_equal(sketch_encoded_version(img2, m),
	    SKETCH_ENCODING_VERSION);
	assert_non_null(e = sketch_decode(img2, m));
	assert_same_sketch(d, e);
	sketch_free(e);
	sketch_free(d);

	/* cap 16, spanning it: 50 counts in the lowest bucket (key 300)
	 * may be folded; 7 at the top (key 315) */
	memset(cnt, 0, sizeof cnt);
	cnt[0] = 50;
	cnt[15] = 7;
	n = v1_image(img, 16, 300, 16, cnt, 0, 0, 0);
	assert_null(sketch_decode(img, n));
	assert_non_null(d = sketch_decode_any(img, n));
	assert_int_equal(sketch_count(d), 57);
	assert_int_equal(sketch_edge_count(d), 50);
	assert_int_equal(sketch_bounds(d, lo, hi, c, 8), 2);
	/* the edge reaches down to the least positive double, up to the
	 * top of bucket 300: gamma^300 */
	assert_true(c[0] == 50 && lo[0] <= DBL_TRUE_MIN * 2);
	assert_true(close_rel(hi[0], exp(300 * 0.020000666706669435), 1e-9));
	assert_true(c[1] == 7 && close_rel(lo[1],
	    exp(314 * 0.020000666706669435), 1e-9));
	/* a damaged old image is still refused: cut short, or its top
	 * count (at 32 + 8 + 15 * 8) zeroed */
	assert_null(sketch_decode_any(img, n - 8));
	img[32 + 8 + 15 * 8] = 0;
	assert_null(sketch_decode_any(img, n));
	sketch_free(d);
}

/* One arm's blocks for the quantile tests, edges at the given side. */
static void
arm_blocks(const struct sketch *s, int side, double **v, uint64_t **c,
    struct stats_blocks *b)
{
	size_t n = sketch_nbuckets(s);

	*v = calloc(n, sizeof **v);
	*c = calloc(n, sizeof **c);
	b->n = sketch_buckets_side(s, side, *v, *c, n);
	b->value = *v;
	b->count = *c;
	b->total = sketch_count(s);
	b->weight = 1;
}

/*
 * Why the tests must read edges by their bounds: two arms of the same
 * lognormal(3, 2) body, too wide for a cap of 100, so both fold their low
 * ends; the treatment's one extra top value sits 40 keys higher, so its
 * low edge reaches 40 keys further up. At its representative (the top
 * of its range) the treatment's whole low edge, over half its values,
 * reads above the control's, and the one-sided test of docs/methods.md
 * sec. 4 (H0: Q_b(0.5) <= Q_a(0.5)) finds "harm" in an A/A. With the
 * control's edges at their highest and the treatment's at their lowest
 * value it finds none. The price: a quantile inside an edge cannot show
 * harm either; one in the kept buckets still can (lognormal(3, 0.3)
 * bodies, also a little wider than the cap, and a 30% slowdown of p90).
 */
static void
test_sides_conservative(void **state)
{
	enum { N = 20000 };
	struct sketch *a = sketch_new(0.01, 100), *b = sketch_new(0.01, 100);
	struct sketch *slow = sketch_new(0.01, 100);
	struct sketch *fast = sketch_new(0.01, 100);
	struct stats_blocks ba, bb;
	double *va, *vb, top = 0, x, e_rep, e_side, e_slow;
	uint64_t *ca, *cb;
	size_t i;

	for (i = 0; i < N; i++) {
		x = exp(3 + 2 * gauss());
		sketch_add(a, x, 1);
		if (x > top)
			top = x;
		x = exp(3 + 2 * gauss());
		sketch_add(b, x, 1);
		if (x > top)
			top = x;
		sketch_add(fast, exp(3 + 0.3 * gauss()), 1);
		sketch_add(slow, 1.3 * exp(3 + 0.3 * gauss()), 1);
	}
	sketch_add(b, top * exp(40 * 0.02), 1);
	sketch_add(a, exp(3 + 2 * gauss()), 1);
	assert_true(sketch_edge_count(a) > N / 2);
	assert_true(sketch_edge_count(b) > N / 2);

	arm_blocks(a, 0, &va, &ca, &ba);
	arm_blocks(b, 0, &vb, &cb, &bb);
	e_rep = stats_quantile_log_e1(&ba, &bb, 0.5, N);
	free(va);
	free(vb);
	free(ca);
	free(cb);
	arm_blocks(a, 1, &va, &ca, &ba);
	arm_blocks(b, -1, &vb, &cb, &bb);
	e_side = stats_quantile_log_e1(&ba, &bb, 0.5, N);
	free(va);
	free(vb);
	free(ca);
	free(cb);
	assert_true(sketch_edge_count(fast) > 0);
	arm_blocks(fast, 1, &va, &ca, &ba);
	arm_blocks(slow, -1, &vb, &cb, &bb);
	e_slow = stats_quantile_log_e1(&ba, &bb, 0.9, N);
	/* log(1/0.05) = 3.0: the level of the engine's default alpha */
	if (!(e_rep > log(1 / 0.05)))
		fail_msg("representatives: log e %g (the trap should show)",
		    e_rep);
	if (!(e_side < log(1 / 0.05)))
		fail_msg("sides: false harm, log e %g", e_side);
	if (!(e_slow > log(1 / 0.05)))
		fail_msg("sides: a 30%% p90 slowdown missed, log e %g",
		    e_slow);
	free(va);
	free(vb);
	free(ca);
	free(cb);
	sketch_free(a);
	sketch_free(b);
	sketch_free(slow);
	sketch_free(fast);
}

/*
 * The bucket views (sketch_buckets_side, sketch_buckets_sides,
 * sketch_nbuckets: direct loops
 * over the stores) against the ordered walk that sketch_bounds and
 * sketch_quantile use, on sketches of every shape: warm lists, dense
 * windows, both edges, negatives and zeros. Same number of blocks, same
 * counts; a bucket's value is the same from every side and within its
 * bounds, an edge's side value is exactly its bound; a short buffer gets
 * the prefix.
 */
#define VIEW_MAX 4096
static void
test_views_vs_walk(void **state)
{
	static double lo[VIEW_MAX], hi[VIEW_MAX], v[3][VIEW_MAX];
	static uint64_t c[4][VIEW_MAX];
	struct sketch *s;
	size_t n, nv[3], i, k, vals;
	int trial, side, edges = 0;
	double x;

	for (trial = 0; trial < 400; trial++) {
		s = sketch_new(trial % 3 == 0 ? 0.01 : 0.002,
		    trial % 2 ? 64 : 1024);
		vals = trial % 5 == 0 ? 1 + rng() % 100 : 1 + rng() % 20000;
		for (k = 0; k < vals; k++) {
			x = exp(gauss() * (trial % 4 + 1));
			switch (rng() % 20) {
			case 0:
				x = -x;
				break;
			case 1:
				x = trial % 7 == 0 ? 0 : x;
				break;
			case 2:
				x *= trial % 3 ? 1e12 : 1e-12;
				break;
			default:
				break;
			}
			assert_int_equal(sketch_add(s, x, 1 + rng() % 3), 0);
		}
		n = sketch_bounds(s, lo, hi, c[3], VIEW_MAX);
		assert_int_equal(sketch_nbuckets(s), n);
		for (side = -1; side <= 1; side++)
			nv[side + 1] = sketch_buckets_side(s, side, v[side + 1],
			    c[side + 1], VIEW_MAX);
		for (side = 0; side < 3; side++) {
			assert_int_equal(nv[side], n);
			assert_memory_equal(c[side], c[3], n * sizeof c[3][0]);
		}
		for (i = 0; i < n; i++) {
			if (v[0][i] == lo[i] && v[2][i] == hi[i] &&
			    v[0][i] != v[1][i]) {
				edges++;
				continue;
			}
			assert_true(v[0][i] == v[1][i] && v[2][i] == v[1][i]);
			assert_true(lo[i] <= v[1][i] && v[1][i] <= hi[i]);
		}
		/* both sides at once: the same bits as each side alone */
		assert_int_equal(sketch_buckets_sides(s, lo, hi, c[3],
		    VIEW_MAX), n);
		assert_memory_equal(lo, v[0], n * sizeof lo[0]);
		assert_memory_equal(hi, v[2], n * sizeof hi[0]);
		assert_memory_equal(c[3], c[0], n * sizeof c[3][0]);
		/* sketch_quantile: the first block whose running count
		 * exceeds q (n - 1), from the side-0 view */
		nv[1] = sketch_buckets_side(s, 0, v[1], c[1], VIEW_MAX);
		for (k = 0; k <= 20; k++) {
			double q = k / 20.0, rank, want = v[1][nv[1] - 1], got;
			uint64_t cum = 0;

			rank = q * (double)(sketch_count(s) - 1);
			for (i = 0; i < nv[1]; i++)
				if ((double)(cum += c[1][i]) > rank) {
					want = v[1][i];
					break;
				}
			got = sketch_quantile(s, q);
			assert_memory_equal(&got, &want, sizeof got);
		}
		/* a short buffer: the first blocks, the same */
		if (n > 2) {
			nv[0] = sketch_buckets_side(s, 1, v[0], c[0], n / 2);
			assert_int_equal(nv[0], n / 2);
			assert_memory_equal(v[0], v[2], (n / 2) * sizeof v[0][0]);
		}
		sketch_free(s);
	}
	assert_true(edges > 50);
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
		cmocka_unit_test(test_outliers),
		cmocka_unit_test(test_sides),
		cmocka_unit_test(test_old_format),
		cmocka_unit_test(test_sides_conservative),
		cmocka_unit_test(test_views_vs_walk),
	};

	return cmocka_run_group_tests(tests, NULL, NULL);
}
