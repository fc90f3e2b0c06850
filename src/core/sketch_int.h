/*
 * sketch_int.h: the sketch's representation, shared by sketch.c (the
 * operations) and sketch_codec.c (the checkpoint encoding). Nothing else
 * includes it: the rest of the tree sees include/stopcock/sketch.h.
 */
#ifndef STOPCOCK_SKETCH_INT_H
#define STOPCOCK_SKETCH_INT_H

#include <stddef.h>
#include <stdint.h>

#define SKETCH_WARM_COUNT 128		/* values held exactly before a window */
#define SKETCH_WARM_KEYS 64		/* distinct keys held so (at most cap) */
#define SKETCH_WARM_FIRST 16		/* warm entries allocated at first */

#define SKETCH_F_WARM 1u
#define SKETCH_F_LOW 2u
#define SKETCH_F_HIGH 4u

#define SKETCH_NOKEY_LO INT32_MIN	/* no low edge: nothing routes there */
#define SKETCH_NOKEY_HI INT32_MAX	/* no high edge */

/* Values beyond the window: an exact count over keys kmin..kmax. */
struct sketch_edge {
	uint64_t	 count;
	int32_t		 kmin, kmax;
};

struct sketch_store {
	/*
	 * Dense: len counts, counts[0] at key offset. Warm: len entries of
	 * a capacity of cap counts followed by cap int32 keys, ascending.
	 */
	uint64_t	*counts;
	uint64_t	 total;		/* window (or list) and both edges */
	struct sketch_edge low, high;
	int32_t		 lowkey;	/* keys <= lowkey go to the low edge */
	int32_t		 offset;
	int32_t		 lo, hi;	/* lowest, highest non-empty window key;
					 * INT32_MAX, INT32_MIN when empty */
	uint32_t	 len;
	uint16_t	 cap;		/* warm capacity in entries */
	uint16_t	 flags;
};

struct sketch {
	double		 accuracy;
	double		 lng;		/* log gamma */
	double		 inv_lng;
	double		 lrep;		/* log(2 / (gamma + 1)) */
	uint64_t	 zero;
	uint64_t	 count;
	uint32_t	 max_buckets;
	struct sketch_store pos, neg;
};

/* The warm list's keys, after its counts. */
static inline int32_t *
sketch_warm_keys(const struct sketch_store *st)
{
	if (st->counts == NULL)
		return NULL;
	return (int32_t *)(void *)(st->counts + st->cap);
}

/* One block of the ordered view: an edge, a bucket or the zeros. */
enum sketch_kind { SK_LOW, SK_KEY, SK_HIGH, SK_ZERO };

struct sketch_block {
	enum sketch_kind kind;
	int		 neg;
	int32_t		 kmin, kmax;
	uint64_t	 count;
};

/*
 * Ordered walk over one store (sketch_view.c): low edge, keys, high edge.
 * *pos is the walker's state (start at 0); returns 0 at the end.
 */
int	 sketch_view_store_next(const struct sketch_store *, int, int64_t *,
	    struct sketch_block *);

#endif
