/* PCG32 (M. E. O'Neill, "PCG: A Family of Simple Fast Space-Efficient
 * Statistically Good Algorithms for Random Number Generation", 2014): the
 * XSH-RR output function over a 64-bit LCG with a selectable odd increment
 * (the "stream"). Small, well studied, and its whole state is two integers,
 * so a checkpoint can store it and a resumed run continues the same
 * sequence. No global state: every user owns its generator. */
#ifndef RC_CORE_RNG_H
#define RC_CORE_RNG_H

#include <stdint.h>

#include "core/status.h"

typedef struct rc_rng {
  uint64_t state;
  uint64_t inc; /* always odd */
} rc_rng;

#define RC_RNG_STATE_BYTES 16

/* Seed with an initial state and a stream number (any 64-bit values; streams
 * differ in the low 63 bits of `stream`). */
void rc__rng_seed(rc_rng *r, uint64_t seed, uint64_t stream);
uint32_t rc__rng_next32(rc_rng *r);
uint64_t rc__rng_next64(rc_rng *r);
/* Uniform in [0, bound) without modulo bias; bound >= 1. */
uint64_t rc__rng_below(rc_rng *r, uint64_t bound);
/* Uniform float in [0, 1) with 24 random bits. */
float rc__rng_uniform(rc_rng *r);
/* Fisher-Yates shuffle of n int64 values in place. */
void rc__rng_shuffle_i64(rc_rng *r, int64_t *v, int64_t n);

/* State as 16 little-endian bytes (state, then increment), and back. Loading
 * refuses an even increment, which no seeded generator has. */
void rc__rng_save(uint8_t out[RC_RNG_STATE_BYTES], const rc_rng *r);
rc_status rc__rng_load(rc_rng *r, const uint8_t in[RC_RNG_STATE_BYTES], rc_err *e);

#endif
