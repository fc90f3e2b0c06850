/*
 * sketch_view.c: the ordered views of a quantile sketch (sketch.c holds
 * adding and merging): the walk over its blocks (low edge, buckets, high
 * edge of each store; negatives, zeros, positives), bucket
 * representatives and bounds, sketch_quantile, and the bucket views the
 * quantile tests read on every look (sketch_buckets_side and friends).
 */
#include <float.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/sketch.h"
#include "stopcock/util.h"
#include "sketch_int.h"

/* edge bounds are widened by this relative amount: log and exp round */
#define SKETCH_BOUND_SLACK 1e-11

/*
 * Ordered walk over one store: low edge, keys, high edge. *pos is the
 * walker's state (start at 0); returns 0 at the end.
 */
int
sketch_view_store_next(const struct sketch_store *st, int neg, int64_t *pos,
    struct sketch_block *b)
{
	const int32_t *wk;
	int64_t p = *pos, k;

	b->neg = neg;
	if (p == INT64_MAX)
		return 0;
	if (p == 0) {
		*pos = p = 1;
		if (st->low.count != 0) {
			b->kind = SK_LOW;
			b->kmin = st->low.kmin;
			b->kmax = st->low.kmax;
			b->count = st->low.count;
			return 1;
		}
	}
	if (st->flags & SKETCH_F_WARM) {
		wk = sketch_warm_keys(st);
		if (p - 1 < (int64_t)st->len) {
			b->kind = SK_KEY;
			b->kmin = b->kmax = wk[p - 1];
			b->count = st->counts[p - 1];
			*pos = p + 1;
			return 1;
		}
	} else if (st->lo <= st->hi) {
		/* p - 1 counts keys from lo */
		for (k = st->lo + (p - 1); k <= st->hi; k++) {
			if (st->counts[k - st->offset] != 0) {
				b->kind = SK_KEY;
				b->kmin = b->kmax = (int32_t)k;
				b->count = st->counts[k - st->offset];
				*pos = k - st->lo + 2;
				return 1;
			}
		}
	}
	if (st->high.count != 0) {
		*pos = INT64_MAX;
		b->kind = SK_HIGH;
		b->kmin = st->high.kmin;
		b->kmax = st->high.kmax;
		b->count = st->high.count;
		return 1;
	}
	*pos = INT64_MAX;
	return 0;
}

/* The whole sketch in increasing order: negatives, zeros, positives. */
struct sketch_walk {
	int	 part;		/* 0 negatives, 1 zero, 2 positives, 3 done */
	int64_t	 pos;
};

static int
sketch_next(const struct sketch *s, struct sketch_walk *w,
    struct sketch_block *b)
{
	for (;;) {
		switch (w->part) {
		case 0:
			if (s->neg.total != 0 &&
			    sketch_view_store_next(&s->neg, 1, &w->pos, b))
				return 1;
			w->part = 1;
			break;
		case 1:
			w->part = 2;
			w->pos = 0;
			if (s->zero != 0) {
				b->kind = SK_ZERO;
				b->neg = 0;
				b->kmin = b->kmax = 0;
				b->count = s->zero;
				return 1;
			}
			break;
		case 2:
			if (s->pos.total != 0 &&
			    sketch_view_store_next(&s->pos, 0, &w->pos, b))
				return 1;
			w->part = 3;
			break;
		default:
			return 0;
		}
	}
}

/* exp(x) capped at DBL_MAX */
static double
sketch_exp(double x)
{
	double v = exp(x);

	return v > DBL_MAX ? DBL_MAX : v;
}

/* Representative 2 gamma^k / (gamma + 1) = gamma^k (1 - a), in logs. */
static double
sketch_value(const struct sketch *s, int32_t key, int negative)
{
	double v;

	if (negative)
		key = -key;
	v = sketch_exp((double)key * s->lng + s->lrep);
	return negative ? -v : v;
}

/*
 * The block's representative: a bucket's own; an edge's is that of its
 * key nearest the window (within a of that bucket's values; the edge's
 * others lie beyond it).
 */
static double
sketch_block_value(const struct sketch *s, const struct sketch_block *b)
{
	switch (b->kind) {
	case SK_ZERO:
		return 0.0;
	case SK_LOW:
		return sketch_value(s, b->kmax, b->neg);
	default:
		return sketch_value(s, b->kmin, b->neg);
	}
}

/*
 * Every value of the block lies in [*lo, *hi]: bucket k of the positive
 * store holds (gamma^(k-1), gamma^k], of the negative store
 * [-gamma^(-k), -gamma^(-k-1)); widened by a hair for rounding.
 */
static void
sketch_block_bounds(const struct sketch *s, const struct sketch_block *b,
    double *lo, double *hi)
{
	double l, h;

	if (b->kind == SK_ZERO) {
		*lo = *hi = 0.0;
		return;
	}
	if (!b->neg) {
		l = sketch_exp(((double)b->kmin - 1) * s->lng);
		h = sketch_exp((double)b->kmax * s->lng);
		*lo = l * (1 - SKETCH_BOUND_SLACK);
		*hi = fmin(h * (1 + SKETCH_BOUND_SLACK), DBL_MAX);
	} else {
		l = sketch_exp(-(double)b->kmin * s->lng);
		h = sketch_exp((-(double)b->kmax - 1) * s->lng);
		*lo = -fmin(l * (1 + SKETCH_BOUND_SLACK), DBL_MAX);
		*hi = -h * (1 - SKETCH_BOUND_SLACK);
	}
}

/*
 * One store's part of sketch_quantile, in the walk's order: 1 with *v
 * once the running count *cum exceeds rank; else 0, with the store's
 * last block in *last (*any set) when it has one.
 */
static int
sketch_store_rank(const struct sketch *s, const struct sketch_store *st,
    int neg, double rank, uint64_t *cum, double *v,
    struct sketch_block *last, int *any)
{
	struct sketch_block b;
	const int32_t *wk;
	uint64_t c;
	uint32_t i;
	int64_t k;

	b.neg = neg;
	if (st->low.count != 0) {
		b.kind = SK_LOW;
		b.kmin = st->low.kmin;
		b.kmax = st->low.kmax;
		b.count = st->low.count;
		if ((double)(*cum += b.count) > rank) {
			*v = sketch_block_value(s, &b);
			return 1;
		}
		*last = b;
		*any = 1;
	}
	b.kind = SK_KEY;
	if (st->flags & SKETCH_F_WARM) {
		wk = sketch_warm_keys(st);
		for (i = 0; i < st->len; i++)
			if ((double)(*cum += st->counts[i]) > rank) {
				*v = sketch_value(s, wk[i], neg);
				return 1;
			}
		if (st->len > 0) {
			b.kmin = b.kmax = wk[st->len - 1];
			b.count = st->counts[st->len - 1];
			*last = b;
			*any = 1;
		}
	} else if (st->lo <= st->hi) {
		for (k = st->lo; k <= st->hi; k++) {
			if ((c = st->counts[k - st->offset]) == 0)
				continue;
			if ((double)(*cum += c) > rank) {
				*v = sketch_value(s, (int32_t)k, neg);
				return 1;
			}
			b.kmin = b.kmax = (int32_t)k;
			b.count = c;
			*last = b;
			*any = 1;
		}
	}
	if (st->high.count != 0) {
		b.kind = SK_HIGH;
		b.kmin = st->high.kmin;
		b.kmax = st->high.kmax;
		b.count = st->high.count;
		if ((double)(*cum += b.count) > rank) {
			*v = sketch_block_value(s, &b);
			return 1;
		}
		*last = b;
		*any = 1;
	}
	return 0;
}

/*
 * Rank q(n - 1) (0-based), and the first block whose running count
 * exceeds it, scanning from the lowest value up (docs/methods.md sec. 7):
 * the order of sketch_next, as plain loops over the stores.
 */
double
sketch_quantile(const struct sketch *s, double q)
{
	struct sketch_block last = { SK_ZERO, 0, 0, 0, 0 };
	double rank, v;
	uint64_t cum = 0;
	int any = 0;

	if (s->count == 0 || !(q >= 0 && q <= 1))
		return NAN;
	rank = q * (double)(s->count - 1);
	if (s->neg.total != 0 &&
	    sketch_store_rank(s, &s->neg, 1, rank, &cum, &v, &last, &any))
		return v;
	if (s->zero != 0) {
		if ((double)(cum += s->zero) > rank)
			return 0.0;
		last.kind = SK_ZERO;
		last.neg = 0;
		last.kmin = last.kmax = 0;
		last.count = s->zero;
		any = 1;
	}
	if (s->pos.total != 0 &&
	    sketch_store_rank(s, &s->pos, 0, rank, &cum, &v, &last, &any))
		return v;
	/* Only reached through rounding of rank near n - 1. */
	return any ? sketch_block_value(s, &last) : NAN;
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

uint64_t
sketch_edge_count(const struct sketch *s)
{
	return s->pos.low.count + s->pos.high.count + s->neg.low.count +
	    s->neg.high.count;
}

static size_t
sketch_store_bytes(const struct sketch_store *st)
{
	if (st->flags & SKETCH_F_WARM)
		return (size_t)st->cap * (sizeof *st->counts + sizeof(int32_t));
	return (size_t)st->len * sizeof *st->counts;
}

size_t
sketch_bytes(const struct sketch *s)
{
	return sizeof *s + sketch_store_bytes(&s->pos) +
	    sketch_store_bytes(&s->neg);
}

/*
 * One store's blocks for the bucket views, in the order of
 * sketch_view_store_next, as plain loops: the quantile tests read every
 * bucket on every look, and the walker's state machine cost more than
 * the values. The values are computed as sketch_buckets_side always did
 * (sketch_block_value, sketch_block_bounds), so they are the same bits.
 */
static size_t
sketch_store_side(const struct sketch *s, const struct sketch_store *st,
    int neg, int side, double *value, uint64_t *count, size_t n, size_t max)
{
	struct sketch_block b;
	const int32_t *wk;
	double lo, hi;
	uint64_t c;
	uint32_t i;
	int64_t k;

	b.neg = neg;
	if (st->low.count != 0 && n < max) {
		b.kind = SK_LOW;
		b.kmin = st->low.kmin;
		b.kmax = st->low.kmax;
		if (side != 0) {
			sketch_block_bounds(s, &b, &lo, &hi);
			value[n] = side < 0 ? lo : hi;
		} else
			value[n] = sketch_block_value(s, &b);
		count[n++] = st->low.count;
	}
	if (st->flags & SKETCH_F_WARM) {
		wk = sketch_warm_keys(st);
		for (i = 0; i < st->len && n < max; i++) {
			value[n] = sketch_value(s, wk[i], neg);
			count[n++] = st->counts[i];
		}
	} else if (st->lo <= st->hi) {
		for (k = st->lo; k <= st->hi && n < max; k++) {
			if ((c = st->counts[k - st->offset]) != 0) {
				value[n] = sketch_value(s, (int32_t)k, neg);
				count[n++] = c;
			}
		}
	}
	if (st->high.count != 0 && n < max) {
		b.kind = SK_HIGH;
		b.kmin = st->high.kmin;
		b.kmax = st->high.kmax;
		if (side != 0) {
			sketch_block_bounds(s, &b, &lo, &hi);
			value[n] = side < 0 ? lo : hi;
		} else
			value[n] = sketch_block_value(s, &b);
		count[n++] = st->high.count;
	}
	return n;
}

/* sketch_store_side for side -1 into vlo and side +1 into vhi at once. */
static size_t
sketch_store_sides(const struct sketch *s, const struct sketch_store *st,
    int neg, double *vlo, double *vhi, uint64_t *count, size_t n,
    size_t max)
{
	struct sketch_block b;
	const int32_t *wk;
	uint64_t c;
	uint32_t i;
	int64_t k;

	b.neg = neg;
	if (st->low.count != 0 && n < max) {
		b.kind = SK_LOW;
		b.kmin = st->low.kmin;
		b.kmax = st->low.kmax;
		sketch_block_bounds(s, &b, &vlo[n], &vhi[n]);
		count[n++] = st->low.count;
	}
	if (st->flags & SKETCH_F_WARM) {
		wk = sketch_warm_keys(st);
		for (i = 0; i < st->len && n < max; i++) {
			vlo[n] = vhi[n] = sketch_value(s, wk[i], neg);
			count[n++] = st->counts[i];
		}
	} else if (st->lo <= st->hi) {
		for (k = st->lo; k <= st->hi && n < max; k++) {
			if ((c = st->counts[k - st->offset]) != 0) {
				vlo[n] = vhi[n] = sketch_value(s, (int32_t)k,
				    neg);
				count[n++] = c;
			}
		}
	}
	if (st->high.count != 0 && n < max) {
		b.kind = SK_HIGH;
		b.kmin = st->high.kmin;
		b.kmax = st->high.kmax;
		sketch_block_bounds(s, &b, &vlo[n], &vhi[n]);
		count[n++] = st->high.count;
	}
	return n;
}

size_t
sketch_buckets_sides(const struct sketch *s, double *lo, double *hi,
    uint64_t *count, size_t max)
{
	size_t n = 0;

	if (s->neg.total != 0)
		n = sketch_store_sides(s, &s->neg, 1, lo, hi, count, n, max);
	if (s->zero != 0 && n < max) {
		lo[n] = hi[n] = 0.0;
		count[n++] = s->zero;
	}
	if (s->pos.total != 0)
		n = sketch_store_sides(s, &s->pos, 0, lo, hi, count, n, max);
	return n;
}

size_t
sketch_buckets_side(const struct sketch *s, int side, double *value,
    uint64_t *count, size_t max)
{
	size_t n = 0;

	if (s->neg.total != 0)
		n = sketch_store_side(s, &s->neg, 1, side, value, count, n,
		    max);
	if (s->zero != 0 && n < max) {
		value[n] = 0.0;
		count[n++] = s->zero;
	}
	if (s->pos.total != 0)
		n = sketch_store_side(s, &s->pos, 0, side, value, count, n,
		    max);
	return n;
}

size_t
sketch_buckets(const struct sketch *s, double *value, uint64_t *count,
    size_t max)
{
	return sketch_buckets_side(s, 0, value, count, max);
}

size_t
sketch_bounds(const struct sketch *s, double *lo, double *hi,
    uint64_t *count, size_t max)
{
	struct sketch_walk w = { 0, 0 };
	struct sketch_block b;
	size_t n = 0;

	while (n < max && sketch_next(s, &w, &b)) {
		sketch_block_bounds(s, &b, &lo[n], &hi[n]);
		count[n++] = b.count;
	}
	return n;
}

/* Blocks of one store, as sketch_view_store_next would give them. */
static size_t
sketch_store_nblocks(const struct sketch_store *st)
{
	size_t n = (st->low.count != 0) + (st->high.count != 0);
	int64_t k;

	if (st->flags & SKETCH_F_WARM)
		return n + st->len;
	if (st->lo <= st->hi)
		for (k = st->lo; k <= st->hi; k++)
			n += st->counts[k - st->offset] != 0;
	return n;
}

size_t
sketch_nbuckets(const struct sketch *s)
{
	return (s->neg.total != 0 ? sketch_store_nblocks(&s->neg) : 0) +
	    (s->zero != 0) +
	    (s->pos.total != 0 ? sketch_store_nblocks(&s->pos) : 0);
}
