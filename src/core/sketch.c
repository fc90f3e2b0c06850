/*
 * sketch.c: the quantile sketch behind latency guardrails, after DDSketch
 * (C. Masson, J. E. Rim, H. K. Lee, "DDSketch: a fast and fully-mergeable
 * quantile sketch with relative-error guarantees", PVLDB 12(12), 2019;
 * docs/methods.md section 7). One sketch per arm and metric; the quantile tests
 * read it through sketch_quantile and sketch_buckets, checkpoints through
 * sketch_encode.
 *
 * Positive values go to bucket key ceil(log x / log gamma); a negative
 * value x goes to key -ceil(log|x| / log gamma) of a second store, so in
 * both stores a lower key is a lower value, and zeros have a counter of
 * their own. Each store is a dense array of counts covering the keys seen,
 * grown by doubling. A store never spans more than max_buckets keys: past
 * that, everything below the top max_buckets keys folds into the lowest
 * kept bucket. Which keys survive depends only on the highest key, so
 * sketching in any order, or merging, gives the same buckets.
 */
#include <float.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/sketch.h"
#include "stopcock/util.h"

#define SKETCH_ACCURACY_MIN 1e-6	/* keys then fit in 32 bits */
#define SKETCH_BUCKETS_MIN 16
#define SKETCH_BUCKETS_MAX (1u << 24)
#define SKETCH_INITIAL 32		/* buckets at a store's first value */

#define SKETCH_MAGIC "SCSK"
#define SKETCH_VERSION 1
#define SKETCH_HEADER 32		/* bytes before the stores */
#define SKETCH_STORE_HEADER 8

struct sketch_store {
	uint64_t	*counts;
	int64_t		 offset;	/* key of counts[0] */
	uint32_t	 len;		/* buckets allocated; 0: none */
	int64_t		 lo, hi;	/* lowest, highest non-empty key (len > 0) */
	uint64_t	 total;
};

struct sketch {
	double		 accuracy;
	double		 lng;		/* log gamma */
	double		 inv_lng;
	double		 lrep;		/* log(2 / (gamma + 1)) */
	int64_t		 kmin, kmax;	/* keys of DBL_TRUE_MIN and DBL_MAX */
	uint32_t	 max_buckets;
	uint64_t	 zero;
	uint64_t	 count;
	struct sketch_store pos, neg;
};

struct sketch *
sketch_new(double accuracy, uint32_t max_buckets)
{
	struct sketch *s;
	double gamma;

	if (!(accuracy >= SKETCH_ACCURACY_MIN && accuracy <= 0.5) ||
	    max_buckets < SKETCH_BUCKETS_MIN ||
	    max_buckets > SKETCH_BUCKETS_MAX)
		return NULL;
	s = xcalloc(1, sizeof *s);
	s->accuracy = accuracy;
	/* gamma = (1 + a) / (1 - a), so (gamma - 1) / (gamma + 1) = a. */
	gamma = (1 + accuracy) / (1 - accuracy);
	s->lng = log1p(2 * accuracy / (1 - accuracy));
	s->inv_lng = 1 / s->lng;
	s->lrep = log(2 / (gamma + 1));
	/* The keys any finite double can reach, for checking decoded input. */
	s->kmin = (int64_t)ceil(log(DBL_TRUE_MIN) * s->inv_lng);
	s->kmax = (int64_t)ceil(log(DBL_MAX) * s->inv_lng);
	s->max_buckets = max_buckets;
	return s;
}

static void
sketch_store_clear(struct sketch_store *st)
{
	free(st->counts);
	memset(st, 0, sizeof *st);
}

void
sketch_free(struct sketch *s)
{
	if (s == NULL)
		return;
	free(s->pos.counts);
	free(s->neg.counts);
	free(s);
}

void
sketch_reset(struct sketch *s)
{
	sketch_store_clear(&s->pos);
	sketch_store_clear(&s->neg);
	s->zero = 0;
	s->count = 0;
}

/*
 * Make the store able to take a count at key: grow or re-place the array
 * and fold whatever falls below the top cap keys into the lowest kept
 * one. Returns the key the count belongs to (key itself, or the lowest
 * kept key when key is below it). Updates lo and hi as if the count were
 * already there. A store with len > 0 always has valid lo and hi (a merge
 * reserves both ends of the other store before adding to either).
 */
static int64_t
sketch_store_room(struct sketch_store *st, int64_t key, uint32_t cap)
{
	int64_t lo, hi, a, k, noff;
	uint64_t span, newlen, *nc, folded = 0;

	lo = st->len ? (key < st->lo ? key : st->lo) : key;
	hi = st->len ? (key > st->hi ? key : st->hi) : key;
	a = hi - (int64_t)cap + 1;
	if (a < lo)
		a = lo;
	span = (uint64_t)(hi - a + 1);

	if (st->len > 0 && a >= st->offset &&
	    hi < st->offset + (int64_t)st->len) {
		/* Covered: only a fold of the low end remains. */
		for (k = st->lo; k < a; k++) {
			folded += st->counts[k - st->offset];
			st->counts[k - st->offset] = 0;
		}
		st->counts[a - st->offset] += folded;
	} else {
		if (st->len == 0)
			newlen = SKETCH_INITIAL;
		else if (span + span / 4 <= st->len)
			newlen = st->len;	/* re-place, room is plenty */
		else
			newlen = 2 * (uint64_t)st->len;
		if (newlen < span)
			newlen = span;
		if (newlen > cap)
			newlen = cap;
		if (st->len == 0)
			noff = key - (int64_t)newlen / 2;
		else if (key < st->lo)
			noff = hi - (int64_t)newlen + 1;	/* room below */
		else
			noff = a;				/* room above */
		nc = xcalloc(newlen, sizeof *nc);
		if (st->len != 0) {
			for (k = st->lo; k <= st->hi; k++)
				nc[(k < a ? a : k) - noff] +=
				    st->counts[k - st->offset];
		}
		free(st->counts);
		st->counts = nc;
		st->offset = noff;
		st->len = (uint32_t)newlen;
	}
	st->lo = lo < a ? a : lo;
	st->hi = hi;
	return key < a ? a : key;
}

static inline void
sketch_store_add(struct sketch_store *st, int64_t key, uint64_t c,
    uint32_t cap)
{
	uint64_t i = (uint64_t)(key - st->offset);

	if (i < st->len) {
		/* len > 0, so lo and hi are valid. */
		st->counts[i] += c;
		if (key < st->lo)
			st->lo = key;
		if (key > st->hi)
			st->hi = key;
	} else {
		key = sketch_store_room(st, key, cap);
		st->counts[key - st->offset] += c;
	}
	st->total += c;
}

int
sketch_add(struct sketch *s, double x, uint64_t c)
{
	int64_t key;

	if (!isfinite(x))
		return -1;
	if (s->count + c < s->count)
		return -1;		/* would wrap: refuse, keep the rest */
	if (c == 0)
		return 0;
	s->count += c;
	if (x > 0) {
		key = (int64_t)ceil(log(x) * s->inv_lng);
		sketch_store_add(&s->pos, key, c, s->max_buckets);
	} else if (x < 0) {
		key = -(int64_t)ceil(log(-x) * s->inv_lng);
		sketch_store_add(&s->neg, key, c, s->max_buckets);
	} else
		s->zero += c;
	return 0;
}

static void
sketch_store_merge(struct sketch_store *st, const struct sketch_store *o,
    uint32_t cap)
{
	int64_t k, kfloor;
	uint64_t c;

	if (o->total == 0)
		return;
	sketch_store_room(st, o->hi, cap);
	sketch_store_room(st, o->lo, cap);
	kfloor = st->lo;
	for (k = o->lo; k <= o->hi; k++) {
		if ((c = o->counts[k - o->offset]) != 0)
			st->counts[(k < kfloor ? kfloor : k) - st->offset] += c;
	}
	st->total += o->total;
}

int
sketch_merge(struct sketch *s, const struct sketch *o)
{
	struct sketch *copy = NULL;

	if (s->accuracy != o->accuracy)
		return -1;
	if (s->count + o->count < s->count)
		return -1;
	if (s == o) {
		/* Merging into itself: read from a snapshot. */
		copy = sketch_new(o->accuracy, o->max_buckets);
		sketch_merge(copy, o);
		o = copy;
	}
	sketch_store_merge(&s->pos, &o->pos, s->max_buckets);
	sketch_store_merge(&s->neg, &o->neg, s->max_buckets);
	s->zero += o->zero;
	s->count += o->count;
	sketch_free(copy);
	return 0;
}

/* Representative 2 gamma^k / (gamma + 1), computed in log space. */
static double
sketch_value(const struct sketch *s, int64_t key, int negative)
{
	double v;

	if (negative)
		key = -key;
	v = exp((double)key * s->lng + s->lrep);
	if (v > DBL_MAX)
		v = DBL_MAX;
	return negative ? -v : v;
}

/*
 * Rank q(n - 1) (0-based), and the first bucket whose running count
 * exceeds it, scanning from the lowest value up (docs/methods.md section 7).
 */
double
sketch_quantile(const struct sketch *s, double q)
{
	double rank;
	uint64_t cum = 0;
	int64_t k;
	const struct sketch_store *st;

	if (s->count == 0 || !(q >= 0 && q <= 1))
		return NAN;
	rank = q * (double)(s->count - 1);
	st = &s->neg;
	if (st->total != 0) {
		for (k = st->lo; k <= st->hi; k++) {
			cum += st->counts[k - st->offset];
			if ((double)cum > rank)
				return sketch_value(s, k, 1);
		}
	}
	cum += s->zero;
	if (s->zero != 0 && (double)cum > rank)
		return 0.0;
	st = &s->pos;
	if (st->total != 0) {
		for (k = st->lo; k <= st->hi; k++) {
			cum += st->counts[k - st->offset];
			if ((double)cum > rank)
				return sketch_value(s, k, 0);
		}
		return sketch_value(s, st->hi, 0);
	}
	/* Only reached through rounding of rank near n - 1. */
	if (s->zero != 0)
		return 0.0;
	return sketch_value(s, s->neg.hi, 1);
}

uint64_t
sketch_count(const struct sketch *s)
{
	return s->count;
}

double
sketch_accuracy(const struct sketch *s)
{
	return s->accuracy;
}

size_t
sketch_bytes(const struct sketch *s)
{
	return sizeof *s +
	    ((size_t)s->pos.len + s->neg.len) * sizeof *s->pos.counts;
}

size_t
sketch_buckets(const struct sketch *s, double *value, uint64_t *count,
    size_t max)
{
	const struct sketch_store *st;
	size_t n = 0;
	int64_t k;
	uint64_t c;
	int neg;

	for (neg = 1; neg >= 0; neg--) {
		st = neg ? &s->neg : &s->pos;
		if (!neg && s->zero != 0 && n < max) {
			value[n] = 0.0;
			count[n++] = s->zero;
		}
		if (st->total == 0)
			continue;
		for (k = st->lo; k <= st->hi && n < max; k++) {
			if ((c = st->counts[k - st->offset]) == 0)
				continue;
			value[n] = sketch_value(s, k, neg);
			count[n++] = c;
		}
	}
	return n;
}

size_t
sketch_nbuckets(const struct sketch *s)
{
	const struct sketch_store *st[2] = { &s->neg, &s->pos };
	size_t n = s->zero != 0;
	int64_t k;
	int i;

	for (i = 0; i < 2; i++) {
		if (st[i]->total == 0)
			continue;
		for (k = st[i]->lo; k <= st[i]->hi; k++)
			n += st[i]->counts[k - st[i]->offset] != 0;
	}
	return n;
}

/*
 * Encoding, all little-endian:
 *   0  "SCSK"   4  version (1)   5  three zero bytes
 *   8  accuracy (IEEE double)   16  max_buckets (u32)   20  zero (u32)
 *   24 zero count (u64)
 *   32 positive store, then negative store, each:
 *      lowest key (i32), span (u32), span counts (u64), the first and
 *      last non-zero.
 */
static size_t
sketch_store_size(const struct sketch_store *st)
{
	return SKETCH_STORE_HEADER +
	    (st->total ? (size_t)(st->hi - st->lo + 1) * 8 : 0);
}

size_t
sketch_encoded_size(const struct sketch *s)
{
	return SKETCH_HEADER + sketch_store_size(&s->pos) +
	    sketch_store_size(&s->neg);
}

static uint8_t *
sketch_put(uint8_t *p, uint64_t v, int bytes)
{
	int i;

	for (i = 0; i < bytes; i++)
		*p++ = (uint8_t)(v >> (8 * i));
	return p;
}

static uint64_t
sketch_get(const uint8_t *p, int bytes)
{
	uint64_t v = 0;
	int i;

	for (i = bytes - 1; i >= 0; i--)
		v = v << 8 | p[i];
	return v;
}

static uint8_t *
sketch_store_put(uint8_t *p, const struct sketch_store *st)
{
	int64_t k;

	if (st->total == 0)
		return sketch_put(sketch_put(p, 0, 4), 0, 4);
	p = sketch_put(p, (uint32_t)(int32_t)st->lo, 4);
	p = sketch_put(p, (uint64_t)(st->hi - st->lo + 1), 4);
	for (k = st->lo; k <= st->hi; k++)
		p = sketch_put(p, st->counts[k - st->offset], 8);
	return p;
}

size_t
sketch_encode(const struct sketch *s, uint8_t *buf, size_t size)
{
	size_t need = sketch_encoded_size(s);
	uint64_t bits;
	uint8_t *p = buf;

	if (size < need)
		return 0;
	memcpy(p, SKETCH_MAGIC, 4);
	p[4] = SKETCH_VERSION;
	p[5] = p[6] = p[7] = 0;
	memcpy(&bits, &s->accuracy, sizeof bits);
	p = sketch_put(p + 8, bits, 8);
	p = sketch_put(p, s->max_buckets, 4);
	p = sketch_put(p, 0, 4);
	p = sketch_put(p, s->zero, 8);
	p = sketch_store_put(p, &s->pos);
	p = sketch_store_put(p, &s->neg);
	return (size_t)(p - buf);
}

/* Read one store; -1 on anything a correct encoder could not write. */
static int
sketch_store_get(struct sketch *s, struct sketch_store *st, int negative,
    const uint8_t **pp, const uint8_t *end, uint64_t *total)
{
	const uint8_t *p = *pp;
	int64_t lo, kmin = s->kmin, kmax = s->kmax;
	uint64_t span, i, c, sum = 0;

	if (end - p < SKETCH_STORE_HEADER)
		return -1;
	lo = (int32_t)(uint32_t)sketch_get(p, 4);
	span = sketch_get(p + 4, 4);
	p += SKETCH_STORE_HEADER;
	if (span == 0) {
		*pp = p;
		return lo == 0 ? 0 : -1;
	}
	if (negative) {
		kmin = -s->kmax;
		kmax = -s->kmin;
	}
	if (span > s->max_buckets || lo < kmin ||
	    lo + (int64_t)span - 1 > kmax ||
	    (uint64_t)(end - p) / 8 < span)
		return -1;
	if (sketch_get(p, 8) == 0 || sketch_get(p + 8 * (span - 1), 8) == 0)
		return -1;
	st->counts = xcalloc(span, sizeof *st->counts);
	for (i = 0; i < span; i++) {
		c = sketch_get(p + 8 * i, 8);
		if (sum + c < sum)
			return -1;
		sum += c;
		st->counts[i] = c;
	}
	st->offset = st->lo = lo;
	st->hi = lo + (int64_t)span - 1;
	st->len = (uint32_t)span;
	st->total = sum;
	if (*total + sum < *total)
		return -1;
	*total += sum;
	*pp = p + 8 * span;
	return 0;
}

struct sketch *
sketch_decode(const uint8_t *buf, size_t size)
{
	const uint8_t *p = buf, *end = buf + size;
	struct sketch *s;
	uint64_t bits, total;
	double accuracy;

	if (size < SKETCH_HEADER || memcmp(buf, SKETCH_MAGIC, 4) != 0 ||
	    buf[4] != SKETCH_VERSION || buf[5] || buf[6] || buf[7] ||
	    sketch_get(buf + 20, 4) != 0)
		return NULL;
	bits = sketch_get(buf + 8, 8);
	memcpy(&accuracy, &bits, sizeof accuracy);
	if ((s = sketch_new(accuracy, (uint32_t)sketch_get(buf + 16, 4))) ==
	    NULL)
		return NULL;
	total = s->zero = sketch_get(buf + 24, 8);
	p += SKETCH_HEADER;
	if (sketch_store_get(s, &s->pos, 0, &p, end, &total) != 0 ||
	    sketch_store_get(s, &s->neg, 1, &p, end, &total) != 0 ||
	    p != end) {
		sketch_free(s);
		return NULL;
	}
	s->count = total;
	return s;
}
