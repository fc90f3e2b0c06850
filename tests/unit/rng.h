/*
 * rng.h: the unit tests' one pseudo-random generator, Marsaglia's
 * xorshift with Vigna's multiplying output (xorshift64*; S. Vigna 2016,
 * "An experimental exploration of Marsaglia's xorshift generators,
 * scrambled", ACM TOMS 42(4), the 12/25/27 shifts and the multiplier).
 * Fast, reproducible from a fixed seed and independent of libc's rand().
 * Define RNG_SEED (a nonzero 64-bit constant) before including it; each
 * test file keeps its own seed so its stream never changes.
 */
#ifndef STOPCOCK_TEST_RNG_H
#define STOPCOCK_TEST_RNG_H

#include <stdint.h>

#ifndef RNG_SEED
#error "define RNG_SEED before including rng.h"
#endif

static uint64_t rng_state = RNG_SEED;

static inline uint64_t
rng(void)
{
	rng_state ^= rng_state >> 12;
	rng_state ^= rng_state << 25;
	rng_state ^= rng_state >> 27;
	return rng_state * 0x2545f4914f6cdd1dULL;
}

#endif
