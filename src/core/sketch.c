/*
 * sketch.c: the quantile sketch behind latency guardrails, after DDSketch
 * (C. Masson, J. E. Rim, H. K. Lee, "DDSketch: a fast and fully-mergeable
 * quantile sketch with relative-error guarantees", PVLDB 12(12), 2019;
 * docs/methods.md section 7). One sketch per arm and metric; the quantile
 * tests read it through sketch_quantile and the bucket views, checkpoints
 * through sketch_encode (sketch_codec.c). The ordered views (walk,
 * quantile, bucket sides, bounds) are in sketch_view.c.
 *
 * Positive values go to bucket key ceil(log x / log gamma); a negative
 * value x goes to key -ceil(log|x| / log gamma) of a second store, so in
 * both stores a lower key is a lower value, and zeros have a counter of
 * their own.
 *
 * A store holds its first values exactly, as a short sorted list of
 * (key, count) ("warm"). Then it places a window: a dense array of at most
 * max_buckets consecutive keys. A value beyond the window goes to one of
 * two edges, each an exact count over a range of keys, so its bounds stay
 * known:
 *  - the low edge takes what DDSketch folds: a window never spans more
 *    than max_buckets keys below its highest one, so a body of values too
 *    wide for the cap loses its low end, not its high quantiles (the
 *    collapse of the lowest buckets in Masson et al. 2019; p99 is what
 *    latency guardrails test);
 *  - the high edge takes outliers. When the window has no room, either
 *    its low end folds or an "island" goes: the keys above a gap of a
 *    factor SKETCH_ISLAND (and 8 mean spacings) from everything below
 *    them. The island goes when it holds clearly fewer values than the
 *    fold would move (sketch_evict). One value of 1e300 then costs one
 *    count in the high edge instead of folding every normal value into
 *    one bucket, as the plain DDSketch rule did (issue 12: 1% at 1e7 read
 *    p90 = 361.5 for 108.1). Later values at or above the island's keys
 *    join the high edge.
 * The warm list lets the first placement see the body's mass, so that a
 * few outliers arriving first cannot anchor the window; outliers making
 * up most of a store's first values still can (then the body's values
 * land in the low edge: counted, bounded, no longer resolved). Counts
 * are exact everywhere; only the edges' values are known as ranges,
 * which sketch_bounds and sketch_buckets_side give to the tests.
 */
#include <float.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/sketch.h"
#include "stopcock/util.h"
#include "sketch_int.h"

#define SKETCH_ACCURACY_MIN 1e-6	/* keys then fit in 32 bits */
#define SKETCH_BUCKETS_MIN 16
#define SKETCH_BUCKETS_MAX (1u << 24)
#define SKETCH_INITIAL 32		/* buckets at a window's first value */
#define SKETCH_ISLAND 64.0		/* gap ratio that makes an outlier */
#define SKETCH_ISLAND_SPACING 8		/* and times the keys' mean spacing */

static void
sketch_store_init(struct sketch_store *st)
{
	memset(st, 0, sizeof *st);
	st->lowkey = SKETCH_NOKEY_LO;
	st->low.kmin = st->low.kmax = 0;
	st->high.kmin = SKETCH_NOKEY_HI;
	st->lo = INT32_MAX;
	st->hi = INT32_MIN;
	st->flags = SKETCH_F_WARM;
}

struct sketch *
sketch_new(double accuracy, uint32_t max_buckets)
{
	struct sketch *s;

	if (!(accuracy >= SKETCH_ACCURACY_MIN && accuracy <= 0.5) ||
	    max_buckets < SKETCH_BUCKETS_MIN ||
	    max_buckets > SKETCH_BUCKETS_MAX)
		return NULL;
	s = xcalloc(1, sizeof *s);
	s->accuracy = accuracy;
	/* gamma = (1 + a) / (1 - a), so (gamma - 1) / (gamma + 1) = a. */
	s->lng = log1p(2 * accuracy / (1 - accuracy));
	s->inv_lng = 1 / s->lng;
	s->lrep = log(2 / ((1 + accuracy) / (1 - accuracy) + 1));
	s->max_buckets = max_buckets;
	sketch_store_init(&s->pos);
	sketch_store_init(&s->neg);
	return s;
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
	free(s->pos.counts);
	free(s->neg.counts);
	sketch_store_init(&s->pos);
	sketch_store_init(&s->neg);
	s->zero = 0;
	s->count = 0;
}

/*
 * Keys of the gap that makes an island among n distinct keys spanning
 * width keys: a ratio of SKETCH_ISLAND at least, and SKETCH_ISLAND_SPACING
 * times their mean spacing, so that the chance gaps of a sparse sample of
 * a wide body (n points over width keys: about n exp(-8) of them) are
 * not taken for outliers.
 */
static int64_t
sketch_gap(const struct sketch *s, int64_t width, uint64_t n)
{
	int64_t g = (int64_t)ceil(log(SKETCH_ISLAND) * s->inv_lng), m;

	if (g < (int64_t)s->max_buckets / 4)
		g = (int64_t)s->max_buckets / 4;
	if (n > 1) {
		m = SKETCH_ISLAND_SPACING * width / (int64_t)(n - 1);
		if (m > g)
			g = m;
	}
	return g;
}

static void
sketch_edge_put(struct sketch_edge *e, int32_t kmin, int32_t kmax,
    uint64_t c)
{
	if (e->count == 0) {
		e->kmin = kmin;
		e->kmax = kmax;
	} else {
		if (kmin < e->kmin)
			e->kmin = kmin;
		if (kmax > e->kmax)
			e->kmax = kmax;
	}
	e->count += c;
}

static void
sketch_low_put(struct sketch_store *st, int32_t kmin, int32_t kmax,
    uint64_t c, int32_t route)
{
	sketch_edge_put(&st->low, kmin, kmax, c);
	if (route > st->lowkey)
		st->lowkey = route;
}

/* Window keys <= k move to the low edge; lowkey rises to k. */
static void
sketch_fold_low(struct sketch_store *st, int32_t k)
{
	int32_t j, stop;
	uint64_t *p;

	if (st->lo <= st->hi && st->lo <= k) {
		stop = k < st->hi ? k : st->hi;
		for (j = st->lo; j <= stop; j++) {
			p = &st->counts[j - st->offset];
			if (*p != 0) {
				sketch_edge_put(&st->low, j, j, *p);
				*p = 0;
			}
		}
		for (j = stop + 1; j <= st->hi &&
		    st->counts[j - st->offset] == 0; j++)
			;
		if (j > st->hi) {
			st->lo = INT32_MAX;
			st->hi = INT32_MIN;
		} else
			st->lo = j;
	}
	if (st->low.count != 0 && k > st->lowkey)
		st->lowkey = k;
}

/* Window keys >= k move to the high edge. */
static void
sketch_fold_high(struct sketch_store *st, int32_t k)
{
	int32_t j, stop;
	uint64_t *p;

	if (st->lo > st->hi || st->hi < k)
		return;
	stop = k > st->lo ? k : st->lo;
	for (j = st->hi; j >= stop; j--) {
		p = &st->counts[j - st->offset];
		if (*p != 0) {
			sketch_edge_put(&st->high, j, j, *p);
			*p = 0;
		}
	}
	for (j = stop - 1; j >= st->lo && st->counts[j - st->offset] == 0;
	    j--)
		;
	if (j < st->lo) {
		st->lo = INT32_MAX;
		st->hi = INT32_MIN;
	} else
		st->hi = j;
}

/*
 * Make the dense array cover keys nlo..nhi (nhi - nlo < cap): grow by
 * doubling, re-place when the room is plenty, leave the spare room on the
 * side the window grows towards.
 */
static void
sketch_place(struct sketch_store *st, int32_t nlo, int32_t nhi, uint32_t cap)
{
	uint64_t span = (uint64_t)((int64_t)nhi - nlo + 1), newlen, *nc;
	int64_t noff;
	int32_t k;

	if (st->len > 0 && nlo >= st->offset &&
	    (int64_t)nhi < (int64_t)st->offset + st->len)
		return;
	if (st->len == 0)
		newlen = SKETCH_INITIAL;
	else if (span + span / 4 <= st->len)
		newlen = st->len;
	else
		newlen = 2 * (uint64_t)st->len;
	if (newlen < span)
		newlen = span;
	if (newlen > cap)
		newlen = cap;
	if (st->lo > st->hi)
		noff = (int64_t)nlo - (int64_t)(newlen - span) / 2;
	else if (nlo < st->lo)
		noff = (int64_t)nhi - (int64_t)newlen + 1;	/* room below */
	else
		noff = nlo;					/* room above */
	/* keep every index of the array a valid int32 key */
	if (noff < INT32_MIN)
		noff = INT32_MIN;
	if (noff + (int64_t)newlen - 1 > INT32_MAX)
		noff = INT32_MAX - (int64_t)newlen + 1;
	nc = xcalloc(newlen, sizeof *nc);
	if (st->lo <= st->hi) {
		for (k = st->lo; k <= st->hi; k++)
			nc[k - noff] = st->counts[k - st->offset];
	}
	free(st->counts);
	st->counts = nc;
	st->offset = (int32_t)noff;
	st->len = (uint32_t)newlen;
}

static void
sketch_window_put(struct sketch_store *st, int32_t key, uint64_t c,
    uint32_t cap)
{
	int32_t nlo = key < st->lo ? key : st->lo;
	int32_t nhi = key > st->hi ? key : st->hi;

	sketch_place(st, nlo, nhi, cap);
	st->counts[key - st->offset] += c;
	st->lo = nlo;
	st->hi = nhi;
	/* DDSketch's rule: nothing more than cap keys below the top */
	if (st->low.count != 0 && (int64_t)nhi - cap > st->lowkey)
		sketch_fold_low(st, (int32_t)((int64_t)nhi - cap));
}

/*
 * The topmost island of the window together with a new key (above hi
 * when top, else below lo): the keys above the highest gap of more than
 * gap keys. Returns its lowest key, or INT32_MAX when there is no gap;
 * *mass is its count.
 */
static int32_t
sketch_island(const struct sketch *s, const struct sketch_store *st,
    int32_t key, uint64_t c, int top, uint64_t *mass)
{
	int64_t prev, gap;
	int32_t j;
	uint64_t m = 0, v, n = 1;

	for (j = st->lo; j <= st->hi; j++)
		n += st->counts[j - st->offset] != 0;
	gap = sketch_gap(s, top ? (int64_t)key - st->lo :
	    (int64_t)st->hi - key, n);
	if (top) {
		prev = key;
		m = c;
	} else
		prev = INT64_MAX;
	for (j = st->hi; j >= st->lo; j--) {
		if ((v = st->counts[j - st->offset]) == 0)
			continue;
		if (prev != INT64_MAX && prev - j > gap) {
			*mass = m;
			return (int32_t)prev;
		}
		prev = j;
		m += v;
	}
	if (!top && prev != INT64_MAX && prev - key > gap) {
		*mass = m;
		return (int32_t)prev;
	}
	*mass = 0;
	return INT32_MAX;
}

/*
 * Whether an island of mass values should go to the high edge rather
 * than fold values into the low edge: only when it is clearly the
 * smaller loss, twice its count (the upper quantiles are what latency
 * guardrails read) and three standard errors (sqrt of a count) below,
 * so that few values cannot flip the choice by chance.
 */
static int
sketch_evict(uint64_t mass, uint64_t fold)
{
	double m = (double)mass;

	return 2 * m + 3 * sqrt(m) + 1 < (double)fold;
}

/* A count for a key outside the window's fast path, dense store. */
static void
sketch_dense_put(const struct sketch *s, struct sketch_store *st,
    int32_t key, uint64_t c)
{
	uint32_t cap = s->max_buckets;
	int32_t b, j;
	uint64_t mass, fold, n;

	for (;;) {
		if (key <= st->lowkey) {
			sketch_low_put(st, key, key, c, st->lowkey);
			return;
		}
		if (key >= st->high.kmin) {
			sketch_edge_put(&st->high, key, key, c);
			return;
		}
		if (st->lo > st->hi || (int64_t)(key > st->hi ? key : st->hi) -
		    (key < st->lo ? key : st->lo) < (int64_t)cap) {
			sketch_window_put(st, key, c, cap);
			return;
		}
		/*
		 * No room: some values lose their buckets. Either the low
		 * end folds (DDSketch) or an island above goes to the high
		 * edge, when it holds clearly fewer values.
		 */
		if (key > st->hi) {
			for (j = st->lo, n = 1, fold = 0; j <= st->hi; j++) {
				n += st->counts[j - st->offset] != 0;
				if ((int64_t)j < (int64_t)key - cap + 1)
					fold += st->counts[j - st->offset];
			}
			if ((int64_t)key - st->hi >
			    sketch_gap(s, (int64_t)key - st->lo, n)) {
				/* alone beyond a gap */
				if (sketch_evict(c, fold)) {
					sketch_edge_put(&st->high, key, key, c);
					return;
				}
			} else if ((b = sketch_island(s, st, key, c, 1,
			    &mass)) != INT32_MAX && sketch_evict(mass, fold)) {
				sketch_fold_high(st, b);
				sketch_edge_put(&st->high, key, key, c);
				return;
			}
			sketch_fold_low(st, (int32_t)((int64_t)key - cap));
			sketch_window_put(st, key, c, cap);
			return;
		}
		/* below the window: what folds is this count */
		if ((b = sketch_island(s, st, key, c, 0, &mass)) !=
		    INT32_MAX && sketch_evict(mass, c)) {
			sketch_fold_high(st, b);
			continue;
		}
		sketch_low_put(st, key, key, c,
		    (int32_t)((int64_t)st->hi - cap));
		return;
	}
}

/*
 * Place the first window from the warm list (keys ascending): while the
 * keys span more than cap, send the topmost island to the high edge when
 * sketch_evict says so, else fold the low end.
 */
static void
sketch_commit(const struct sketch *s, struct sketch_store *st)
{
	uint64_t *wc = st->counts, mass, fold;
	int32_t *wk = sketch_warm_keys(st);
	size_t n = st->len, l = 0, r, i, top;
	int64_t gap, cap = s->max_buckets;

	st->counts = NULL;
	st->len = 0;
	st->cap = 0;
	st->flags &= (uint16_t)~SKETCH_F_WARM;
	st->lo = INT32_MAX;
	st->hi = INT32_MIN;
	if (n == 0) {
		free(wc);
		return;
	}
	r = n - 1;
	while ((int64_t)wk[r] - wk[l] >= cap) {
		gap = sketch_gap(s, (int64_t)wk[r] - wk[l], r - l + 1);
		for (i = r, top = n, mass = wc[r]; i > l; i--) {
			if ((int64_t)wk[i] - wk[i - 1] > gap) {
				top = i;
				break;
			}
			mass += wc[i - 1];
		}
		for (i = l, fold = 0; i <= r &&
		    (int64_t)wk[i] < (int64_t)wk[r] - cap + 1; i++)
			fold += wc[i];
		/* as in sketch_dense_put: the fewer values lose buckets */
		if (top < n && sketch_evict(mass, fold)) {
			for (i = top; i <= r; i++)
				sketch_edge_put(&st->high, wk[i], wk[i], wc[i]);
			r = top - 1;
			continue;
		}
		while ((int64_t)wk[r] - wk[l] >= cap) {
			sketch_edge_put(&st->low, wk[l], wk[l], wc[l]);
			l++;
		}
		st->lowkey = (int32_t)((int64_t)wk[r] - cap);
	}
	for (i = l; i <= r; i++)
		sketch_window_put(st, wk[i], wc[i], (uint32_t)cap);
	free(wc);
}

/*
 * A count into a warm store. Returns 1 when taken, 0 when the store had
 * to commit first (the caller then adds to the dense store).
 */
static int
sketch_warm_put(const struct sketch *s, struct sketch_store *st,
    int32_t key, uint64_t c)
{
	uint32_t limit = s->max_buckets < SKETCH_WARM_KEYS ? s->max_buckets :
	    SKETCH_WARM_KEYS;
	size_t lo = 0, hi = st->len, mid, ncap;
	int32_t *wk = sketch_warm_keys(st);
	uint64_t *nc;

	while (lo < hi) {
		mid = lo + (hi - lo) / 2;
		if (wk[mid] < key)
			lo = mid + 1;
		else
			hi = mid;
	}
	if (lo < st->len && wk[lo] == key) {
		st->counts[lo] += c;
		st->total += c;
	} else {
		if (st->len == limit) {
			sketch_commit(s, st);
			return 0;
		}
		if (st->len == st->cap) {
			ncap = st->cap ? 2 * (size_t)st->cap : SKETCH_WARM_FIRST;
			if (ncap > limit)
				ncap = limit;
			nc = xcalloc(ncap, sizeof *nc + sizeof *wk);
			if (st->len != 0) {
				memcpy(nc, st->counts, st->len * sizeof *nc);
				memcpy(nc + ncap, wk, st->len * sizeof *wk);
			}
			free(st->counts);
			st->counts = nc;
			st->cap = (uint16_t)ncap;
			wk = sketch_warm_keys(st);
		}
		memmove(st->counts + lo + 1, st->counts + lo,
		    (st->len - lo) * sizeof *st->counts);
		memmove(wk + lo + 1, wk + lo, (st->len - lo) * sizeof *wk);
		st->counts[lo] = c;
		wk[lo] = key;
		st->len++;
		st->total += c;
	}
	if (st->total >= SKETCH_WARM_COUNT)
		sketch_commit(s, st);
	return 1;
}

static void
sketch_store_add(const struct sketch *s, struct sketch_store *st,
    int32_t key, uint64_t c)
{
	uint64_t i = (uint64_t)((int64_t)key - st->offset);

	if (i < st->len && !(st->flags & SKETCH_F_WARM) &&
	    key > st->lowkey && key < st->high.kmin) {
		st->counts[i] += c;
		st->total += c;
		if (key < st->lo)
			st->lo = key;
		if (key > st->hi) {
			st->hi = key;
			/* keep the window within cap keys of its top */
			if (st->low.count != 0 &&
			    (int64_t)key - s->max_buckets > st->lowkey)
				sketch_fold_low(st, (int32_t)((int64_t)key -
				    s->max_buckets));
		}
		return;
	}
	if ((st->flags & SKETCH_F_WARM) && sketch_warm_put(s, st, key, c))
		return;
	sketch_dense_put(s, st, key, c);
	st->total += c;
}

static int32_t
sketch_key(const struct sketch *s, double x)
{
	double k = ceil(log(fabs(x)) * s->inv_lng);

	return x > 0 ? (int32_t)k : -(int32_t)k;
}

int
sketch_add(struct sketch *s, double x, uint64_t c)
{
	if (!isfinite(x))
		return -1;
	if (s->count + c < s->count)
		return -1;		/* would wrap: refuse, keep the rest */
	if (c == 0)
		return 0;
	s->count += c;
	if (x > 0)
		sketch_store_add(s, &s->pos, sketch_key(s, x), c);
	else if (x < 0)
		sketch_store_add(s, &s->neg, sketch_key(s, x), c);
	else
		s->zero += c;
	return 0;
}

/* Merging o's edges into st: an edge overlapping the other side folds. */
static void
sketch_merge_edges(const struct sketch *s, struct sketch_store *st,
    const struct sketch_store *o)
{
	int32_t k;

	if (o->low.count == 0 && o->high.count == 0)
		return;
	if (st->flags & SKETCH_F_WARM)
		sketch_commit(s, st);
	if (o->low.count != 0) {
		sketch_low_put(st, o->low.kmin, o->low.kmax, o->low.count,
		    o->lowkey);
		sketch_fold_low(st, st->lowkey);
	}
	if (o->high.count != 0) {
		sketch_edge_put(&st->high, o->high.kmin, o->high.kmax,
		    o->high.count);
		sketch_fold_high(st, st->high.kmin);
	}
	if (st->low.count != 0 && st->high.count != 0 &&
	    st->lowkey >= st->high.kmin) {
		/* the ranges meet: one low edge holds everything */
		k = st->high.kmax > st->lowkey ? st->high.kmax : st->lowkey;
		sketch_fold_low(st, k);
		sketch_low_put(st, st->high.kmin, st->high.kmax,
		    st->high.count, k);
		st->high.count = 0;
		st->high.kmin = SKETCH_NOKEY_HI;
		st->high.kmax = 0;
	}
	if (st->low.count != 0 && st->lo <= st->hi &&
	    (int64_t)st->hi - s->max_buckets > st->lowkey)
		sketch_fold_low(st, (int32_t)((int64_t)st->hi -
		    s->max_buckets));
	st->total += o->low.count + o->high.count;
}

static void
sketch_store_merge(const struct sketch *s, struct sketch_store *st,
    const struct sketch_store *o)
{
	struct sketch_block b;
	int64_t pos = 0;

	if (o->total == 0)
		return;
	sketch_merge_edges(s, st, o);
	while (sketch_view_store_next(o, 0, &pos, &b)) {
		if (b.kind == SK_KEY)
			sketch_store_add(s, st, b.kmin, b.count);
	}
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
	sketch_store_merge(s, &s->pos, &o->pos);
	sketch_store_merge(s, &s->neg, &o->neg);
	s->zero += o->zero;
	s->count += o->count;
	sketch_free(copy);
	return 0;
}
