/*
 * sketch_codec.c: the sketch's flat encoding for checkpoints
 * (engine_image.c stores it in base64). One spelling per sketch: decode
 * accepts only what encode can write, and refuses the format of earlier
 * versions (docs/methods.md sec. 7).
 */
#include <float.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/sketch.h"
#include "stopcock/util.h"
#include "sketch_int.h"

#define SKETCH_MAGIC "SCSK"
#define SKETCH_VERSION SKETCH_ENCODING_VERSION
#define SKETCH_HEADER 32		/* bytes before the stores */

/* The keys any finite double can reach in a store. */
static void
sketch_key_range(const struct sketch *s, int neg, int64_t *kmin,
    int64_t *kmax)
{
	int64_t a = (int64_t)ceil(log(DBL_TRUE_MIN) * s->inv_lng);
	int64_t b = (int64_t)ceil(log(DBL_MAX) * s->inv_lng);

	*kmin = neg ? -b : a;
	*kmax = neg ? -a : b;
}

/*
 * Encoding, all little-endian:
 *   0  "SCSK"   4  version (2)   5  three zero bytes
 *   8  accuracy (IEEE double)   16  max_buckets (u32)   20  zero (u32)
 *   24 zero count (u64)
 *   32 positive store, then negative store, each:
 *      flags (u32: 1 warm, 2 low edge, 4 high edge);
 *      low edge: route key, kmin, kmax (i32), count (u64);
 *      high edge: kmin, kmax (i32), count (u64);
 *      warm: n (u32), n times key (i32) and count (u64), keys ascending;
 *      else: lowest key (i32), span (u32), span counts (u64), the first
 *      and last non-zero (span 0, key 0: an empty window).
 * Version 1 (no edges, the lowest bucket holding what was folded) is
 * refused: sketch_encoded_version tells the caller why.
 */
static size_t
sketch_store_size(const struct sketch_store *st)
{
	size_t n = 4;

	if (st->low.count != 0)
		n += 20;
	if (st->high.count != 0)
		n += 16;
	if (st->flags & SKETCH_F_WARM)
		return n + 4 + (size_t)st->len * 12;
	return n + 8 + (st->lo <= st->hi ?
	    (size_t)((int64_t)st->hi - st->lo + 1) * 8 : 0);
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
sketch_put_key(uint8_t *p, int32_t k)
{
	return sketch_put(p, (uint32_t)k, 4);
}

static int32_t
sketch_get_key(const uint8_t *p)
{
	return (int32_t)(uint32_t)sketch_get(p, 4);
}

static uint8_t *
sketch_store_put(uint8_t *p, const struct sketch_store *st)
{
	const int32_t *wk;
	uint32_t flags = st->flags & SKETCH_F_WARM;
	int32_t k;
	size_t i;

	if (st->low.count != 0)
		flags |= SKETCH_F_LOW;
	if (st->high.count != 0)
		flags |= SKETCH_F_HIGH;
	p = sketch_put(p, flags, 4);
	if (flags & SKETCH_F_LOW) {
		p = sketch_put_key(p, st->lowkey);
		p = sketch_put_key(p, st->low.kmin);
		p = sketch_put_key(p, st->low.kmax);
		p = sketch_put(p, st->low.count, 8);
	}
	if (flags & SKETCH_F_HIGH) {
		p = sketch_put_key(p, st->high.kmin);
		p = sketch_put_key(p, st->high.kmax);
		p = sketch_put(p, st->high.count, 8);
	}
	if (flags & SKETCH_F_WARM) {
		wk = sketch_warm_keys(st);
		p = sketch_put(p, st->len, 4);
		for (i = 0; i < st->len; i++) {
			p = sketch_put_key(p, wk[i]);
			p = sketch_put(p, st->counts[i], 8);
		}
		return p;
	}
	if (st->lo > st->hi)
		return sketch_put(sketch_put(p, 0, 4), 0, 4);
	p = sketch_put_key(p, st->lo);
	p = sketch_put(p, (uint64_t)((int64_t)st->hi - st->lo + 1), 4);
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

int
sketch_encoded_version(const uint8_t *buf, size_t size)
{
	if (size < 5 || memcmp(buf, SKETCH_MAGIC, 4) != 0)
		return -1;
	return buf[4];
}

static int
sketch_add_total(uint64_t *total, uint64_t c)
{
	if (*total + c < *total)
		return -1;
	*total += c;
	return 0;
}

/* An edge read from an image: ordered keys a store can hold, count > 0. */
static int
sketch_edge_ok(const struct sketch_edge *e, int64_t kmin, int64_t kmax)
{
	return e->count != 0 && e->kmin <= e->kmax && e->kmin >= kmin &&
	    e->kmax <= kmax;
}

/*
 * Read one store; -1 on anything a correct encoder could not write: the
 * state the image describes must be one the code above can reach in its
 * invariants (ordered edges around the window, a warm list short,
 * ascending and light enough to be still warm).
 */
static int
sketch_store_get(struct sketch *s, struct sketch_store *st, int negative,
    const uint8_t **pp, const uint8_t *end, uint64_t *total)
{
	const uint8_t *p = *pp;
	int64_t kmin, kmax, lo, span, i;
	uint32_t flags, limit;
	uint64_t c, sum = 0;
	int32_t *wk;

	sketch_key_range(s, negative, &kmin, &kmax);
	if (end - p < 4)
		return -1;
	flags = (uint32_t)sketch_get(p, 4);
	p += 4;
	if (flags & ~(uint32_t)(SKETCH_F_WARM | SKETCH_F_LOW | SKETCH_F_HIGH))
		return -1;
	if ((flags & SKETCH_F_WARM) && (flags & ~SKETCH_F_WARM))
		return -1;
	if (flags & SKETCH_F_LOW) {
		if (end - p < 20)
			return -1;
		st->lowkey = sketch_get_key(p);
		st->low.kmin = sketch_get_key(p + 4);
		st->low.kmax = sketch_get_key(p + 8);
		st->low.count = sketch_get(p + 12, 8);
		p += 20;
		if (!sketch_edge_ok(&st->low, kmin, kmax) ||
		    st->lowkey < st->low.kmax || st->lowkey > kmax ||
		    sketch_add_total(&sum, st->low.count) != 0)
			return -1;
	}
	if (flags & SKETCH_F_HIGH) {
		if (end - p < 16)
			return -1;
		st->high.kmin = sketch_get_key(p);
		st->high.kmax = sketch_get_key(p + 4);
		st->high.count = sketch_get(p + 8, 8);
		p += 16;
		if (!sketch_edge_ok(&st->high, kmin, kmax) ||
		    sketch_add_total(&sum, st->high.count) != 0)
			return -1;
		if ((flags & SKETCH_F_LOW) && st->lowkey >= st->high.kmin)
			return -1;
	}
	st->flags = (uint16_t)(flags & SKETCH_F_WARM);
	if (flags & SKETCH_F_WARM) {
		limit = s->max_buckets < SKETCH_WARM_KEYS ? s->max_buckets :
		    SKETCH_WARM_KEYS;
		if (end - p < 4)
			return -1;
		span = (int64_t)sketch_get(p, 4);
		p += 4;
		if (span > limit || (end - p) / 12 < span)
			return -1;
		if (span > 0) {
			for (i = SKETCH_WARM_FIRST; i < span; i *= 2)
				;
			if (i > limit)
				i = limit;
			st->cap = (uint16_t)i;
			st->counts = xcalloc((size_t)i, sizeof *st->counts +
			    sizeof *wk);
			wk = sketch_warm_keys(st);
		} else
			wk = NULL;
		for (i = 0; i < span; i++) {
			wk[i] = sketch_get_key(p + 12 * i);
			c = sketch_get(p + 12 * i + 4, 8);
			st->counts[i] = c;
			if (c == 0 || wk[i] < kmin || wk[i] > kmax ||
			    (i > 0 && wk[i] <= wk[i - 1]) ||
			    sketch_add_total(&sum, c) != 0)
				return -1;
		}
		st->len = (uint32_t)span;
		if (sum >= SKETCH_WARM_COUNT)
			return -1;
		p += 12 * span;
	} else {
		if (end - p < 8)
			return -1;
		lo = sketch_get_key(p);
		span = (int64_t)sketch_get(p + 4, 4);
		p += 8;
		if (span == 0) {
			if (lo != 0 || !(flags & (SKETCH_F_LOW | SKETCH_F_HIGH)))
				return -1;
		} else {
			if (span > s->max_buckets || lo < kmin ||
			    lo + span - 1 > kmax || (end - p) / 8 < span)
				return -1;
			if (sketch_get(p, 8) == 0 ||
			    sketch_get(p + 8 * (span - 1), 8) == 0)
				return -1;
			if ((flags & SKETCH_F_LOW) && (lo <= st->lowkey ||
			    lo + span - 1 - st->lowkey > s->max_buckets))
				return -1;
			if ((flags & SKETCH_F_HIGH) &&
			    lo + span - 1 >= st->high.kmin)
				return -1;
			st->counts = xcalloc((size_t)span, sizeof *st->counts);
			for (i = 0; i < span; i++) {
				c = sketch_get(p + 8 * i, 8);
				if (sketch_add_total(&sum, c) != 0)
					return -1;
				st->counts[i] = c;
			}
			st->offset = st->lo = (int32_t)lo;
			st->hi = (int32_t)(lo + span - 1);
			st->len = (uint32_t)span;
			p += 8 * span;
		}
	}
	st->total = sum;
	if (sketch_add_total(total, sum) != 0)
		return -1;
	*pp = p;
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

/*
 * One store of a version-1 image: lowest key (i32), span (u32), span
 * counts, the first and last non-zero. That encoder folded every key
 * below the top max_buckets into the lowest kept bucket, so a store
 * spanning its whole cap may hold folded values there: that bucket
 * becomes a low edge reaching down to the least key the store can hold.
 */
static int
sketch_store_get_v1(struct sketch *s, struct sketch_store *st, int negative,
    const uint8_t **pp, const uint8_t *end, uint64_t *total)
{
	const uint8_t *p = *pp;
	int64_t kmin, kmax, lo, span, i, first;
	uint64_t c, sum = 0;

	sketch_key_range(s, negative, &kmin, &kmax);
	if (end - p < 8)
		return -1;
	lo = sketch_get_key(p);
	span = (int64_t)sketch_get(p + 4, 4);
	p += 8;
	if (span == 0) {
		*pp = p;
		return lo == 0 ? 0 : -1;
	}
	if (span > s->max_buckets || lo < kmin || lo + span - 1 > kmax ||
	    (end - p) / 8 < span || sketch_get(p, 8) == 0 ||
	    sketch_get(p + 8 * (span - 1), 8) == 0)
		return -1;
	st->flags = 0;
	st->counts = xcalloc((size_t)span, sizeof *st->counts);
	st->offset = (int32_t)lo;
	st->len = (uint32_t)span;
	for (i = 0; i < span; i++) {
		c = sketch_get(p + 8 * i, 8);
		if (sketch_add_total(&sum, c) != 0)
			return -1;
		st->counts[i] = c;
	}
	first = 0;
	if (span == s->max_buckets) {
		st->low.count = st->counts[0];
		st->low.kmin = (int32_t)kmin;
		st->low.kmax = st->lowkey = (int32_t)lo;
		st->counts[0] = 0;
		for (first = 1; first < span && st->counts[first] == 0; first++)
			;
	}
	if (first < span) {
		st->lo = (int32_t)(lo + first);
		st->hi = (int32_t)(lo + span - 1);
	}
	st->total = sum;
	if (sketch_add_total(total, sum) != 0)
		return -1;
	*pp = p + 8 * span;
	return 0;
}

struct sketch *
sketch_decode_any(const uint8_t *buf, size_t size)
{
	const uint8_t *p = buf, *end = buf + size;
	struct sketch *s;
	uint64_t bits, total;
	double accuracy;

	if (sketch_encoded_version(buf, size) != 1)
		return sketch_decode(buf, size);
	if (size < SKETCH_HEADER || buf[5] || buf[6] || buf[7] ||
	    sketch_get(buf + 20, 4) != 0)
		return NULL;
	bits = sketch_get(buf + 8, 8);
	memcpy(&accuracy, &bits, sizeof accuracy);
	if ((s = sketch_new(accuracy, (uint32_t)sketch_get(buf + 16, 4))) ==
	    NULL)
		return NULL;
	total = s->zero = sketch_get(buf + 24, 8);
	p += SKETCH_HEADER;
	if (sketch_store_get_v1(s, &s->pos, 0, &p, end, &total) != 0 ||
	    sketch_store_get_v1(s, &s->neg, 1, &p, end, &total) != 0 ||
	    p != end) {
		sketch_free(s);
		return NULL;
	}
	s->count = total;
	return s;
}
