/*
 * sketch.h: a mergeable quantile sketch with relative accuracy, after
 * DDSketch (Masson, Rim & Lee, PVLDB 2019). Values map to logarithmic
 * buckets; a query answers within the relative accuracy of the true
 * order statistic. The number of buckets is capped: past the cap the
 * lowest buckets collapse, so only low quantiles lose accuracy.
 * Zero and negative values are kept (a zero count and a mirrored store).
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
/* Number of non-empty buckets (an upper bound for sketch_buckets). */
size_t		 sketch_nbuckets(const struct sketch *);

/* Flat encoding for checkpoints; sketch_decode returns NULL on bad input. */
size_t		 sketch_encoded_size(const struct sketch *);
size_t		 sketch_encode(const struct sketch *, uint8_t *buf, size_t size);
struct sketch	*sketch_decode(const uint8_t *buf, size_t size);

#endif
