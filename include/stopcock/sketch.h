/*
 * sketch.h: a mergeable quantile sketch with relative accuracy, after
 * DDSketch (Masson, Rim & Lee, PVLDB 2019). Values map to logarithmic
 * buckets; a query answers within the relative accuracy of the true
 * order statistic. The number of buckets is capped. Values beyond the
 * buckets kept are counted exactly in two edges, each a range of keys:
 * the low edge takes the low end of a body too wide for the cap (so only
 * low quantiles lose accuracy, as in DDSketch), the high edge takes
 * outliers far above the rest (so a few huge values cost nothing to the
 * quantiles below them). The edges' values are known only by their
 * bounds (sketch_bounds, sketch_buckets_side). Zero and negative values
 * are kept (a zero count and a mirrored store).
 */
#ifndef STOPCOCK_SKETCH_H
#define STOPCOCK_SKETCH_H

#include <stddef.h>
#include <stdint.h>

#define SKETCH_BUCKETS_DEFAULT 512
#define SKETCH_ACCURACY_DEFAULT 0.01

struct sketch;

/* accuracy in [1e-6, 0.5], max_buckets in [16, 2^24]; NULL otherwise. */
struct sketch	*sketch_new(double accuracy, uint32_t max_buckets);
void		 sketch_free(struct sketch *);
void		 sketch_reset(struct sketch *);
/* Adds count copies of x; non-finite x is ignored and returns -1. */
int		 sketch_add(struct sketch *, double x, uint64_t count);
/* -1 when the accuracies differ. */
int		 sketch_merge(struct sketch *, const struct sketch *);
/* q in [0, 1]; NAN when empty. */
double		 sketch_quantile(const struct sketch *, double q);
uint64_t	 sketch_count(const struct sketch *);
double		 sketch_accuracy(const struct sketch *);
size_t		 sketch_bytes(const struct sketch *);

/*
 * Ordered view for rank-based tests: the non-empty buckets in increasing
 * order of value, as (representative value, count). Returns the number of
 * entries written (at most max). Buckets of equal value are tie blocks.
 */
size_t		 sketch_buckets(const struct sketch *, double *value,
		    uint64_t *count, size_t max);
/*
 * As sketch_buckets, but each edge (a block of values beyond the kept
 * buckets) stands at the lowest (side < 0) or highest (side > 0) value it
 * may hold instead of its representative; side 0 is sketch_buckets.
 * Regular buckets keep their representatives (within the accuracy of
 * their values, which a caller widens by as it needs). A test that must
 * not see harm where there is none reads the arm whose rise would be
 * harm at side < 0 and the other at side > 0.
 */
size_t		 sketch_buckets_side(const struct sketch *, int side,
		    double *value, uint64_t *count, size_t max);
/* Both sides at once: lo[] as side < 0, hi[] as side > 0 (the same
 * bits), each bucket's representative computed once. */
size_t		 sketch_buckets_sides(const struct sketch *, double *lo,
		    double *hi, uint64_t *count, size_t max);
/*
 * The same blocks as intervals: every value a block holds lies in
 * [lo, hi] (a bucket's own range; an edge's whole range; 0 for zeros).
 */
size_t		 sketch_bounds(const struct sketch *, double *lo, double *hi,
		    uint64_t *count, size_t max);
/* Number of non-empty blocks (an upper bound for the views above). */
size_t		 sketch_nbuckets(const struct sketch *);
/* Values held in edges, known only by their bounds. */
uint64_t	 sketch_edge_count(const struct sketch *);

/*
 * Flat encoding for checkpoints; sketch_decode returns NULL on bad input,
 * including images of an older format (version 1, before the edges;
 * sketch_decode_any reads those): sketch_encoded_version gives the
 * version an image claims (-1: not a sketch), so a caller can say why.
 */
size_t		 sketch_encoded_size(const struct sketch *);
size_t		 sketch_encode(const struct sketch *, uint8_t *buf, size_t size);
struct sketch	*sketch_decode(const uint8_t *buf, size_t size);
int		 sketch_encoded_version(const uint8_t *buf, size_t size);
/*
 * sketch_decode, and also version-1 images (for checkpoints of the
 * previous release): a store that had reached its cap may have folded
 * values into its lowest bucket, which comes back as a low edge reaching
 * down to the least value the store can hold. sketch_decode stays strict
 * so that an image has one spelling.
 */
struct sketch	*sketch_decode_any(const uint8_t *buf, size_t size);
#define SKETCH_ENCODING_VERSION 2

#endif
