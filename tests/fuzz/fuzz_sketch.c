/*
 * fuzz_sketch.c: libFuzzer target for the sketch. Inputs starting with
 * an even byte go to sketch_decode: garbage must give NULL or a sketch
 * whose own encoding is byte for byte the input (one spelling per
 * sketch). Odd first bytes drive a sketch with a small cap through adds
 * of arbitrary doubles, merges and queries, checking that the bucket view
 * stays in non-decreasing order, the counts add up, and quantiles never decrease in q.
 */
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/sketch.h"

int LLVMFuzzerTestOneInput(const uint8_t *, size_t);

static void
fuzz_check(const struct sketch *s)
{
	double v[64], prev = -INFINITY, q, x;
	uint64_t c[64], sum = 0;
	size_t n, i;

	n = sketch_nbuckets(s);
	if (n <= 64) {
		if (sketch_buckets(s, v, c, 64) != n)
			abort();
		/* Ties are allowed (sketch.h): near DBL_TRUE_MIN neighbouring
		 * buckets round to the same subnormal. */
		for (i = 0; i < n; i++) {
			if (!(v[i] >= prev) || c[i] == 0)
				abort();
			prev = v[i];
			sum += c[i];
		}
		if (sum != sketch_count(s))
			abort();
	}
	prev = -INFINITY;
	for (q = 0; q <= 1; q += 0.125) {
		x = sketch_quantile(s, q);
		if (sketch_count(s) == 0) {
			if (!isnan(x))
				abort();
			continue;
		}
		if (isnan(x) || x < prev)
			abort();
		prev = x;
	}
}

static void
fuzz_decode(const uint8_t *data, size_t size)
{
	struct sketch *s;
	uint8_t *buf;

	if ((s = sketch_decode(data, size)) == NULL)
		return;
	if (sketch_encoded_size(s) != size)
		abort();
	buf = malloc(size);
	if (buf == NULL || sketch_encode(s, buf, size) != size ||
	    memcmp(buf, data, size) != 0)
		abort();
	free(buf);
	fuzz_check(s);
	sketch_free(s);
}

static void
fuzz_ops(const uint8_t *data, size_t size)
{
	struct sketch *s = sketch_new(0.05, 16), *t = sketch_new(0.05, 24);
	double x;
	uint64_t before;
	uint8_t op;

	while (size >= 9) {
		op = data[0];
		memcpy(&x, data + 1, sizeof x);
		data += 9;
		size -= 9;
		before = sketch_count(s);
		switch (op % 4) {
		case 0:
		case 1:
			if (sketch_add(op & 4 ? t : s, x, 1 + (op >> 4)) != 0 &&
			    isfinite(x))
				abort();
			break;
		case 2:
			if (sketch_merge(s, t) != 0)
				abort();
			if (sketch_count(s) != before + sketch_count(t))
				abort();
			break;
		default:
			sketch_reset(op & 4 ? t : s);
		}
		fuzz_check(s);
	}
	fuzz_check(t);
	sketch_free(s);
	sketch_free(t);
}

int
LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
	if (size == 0)
		return 0;
	if (data[0] & 1)
		fuzz_ops(data + 1, size - 1);
	else
		fuzz_decode(data + 1, size - 1);
	return 0;
}
