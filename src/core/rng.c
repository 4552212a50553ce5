#include "core/rng.h"

/* The 64-bit LCG multiplier used by PCG (Knuth's MMIX constant). */
#define PCG_MULT 6364136223846793005ULL

static uint32_t rotr32(uint32_t x, unsigned k) { return (x >> k) | (x << ((32u - k) & 31u)); }

uint32_t rc__rng_next32(rc_rng *r) {
  uint64_t old = r->state;
  r->state = old * PCG_MULT + r->inc;
  /* XSH-RR: xorshift the high bits down, then rotate by the top 5 bits. */
  uint32_t x = (uint32_t)(((old >> 18) ^ old) >> 27);
  return rotr32(x, (unsigned)(old >> 59));
}

void rc__rng_seed(rc_rng *r, uint64_t seed, uint64_t stream) {
  r->state = 0;
  r->inc = (stream << 1) | 1u;
  rc__rng_next32(r);
  r->state += seed;
  rc__rng_next32(r);
}

uint64_t rc__rng_next64(rc_rng *r) {
  uint64_t hi = rc__rng_next32(r);
  return (hi << 32) | rc__rng_next32(r);
}

uint64_t rc__rng_below(rc_rng *r, uint64_t bound) {
  if (bound <= 1) return 0;
  if (bound <= UINT32_MAX) {
    /* Reject the low 2^32 mod bound values so every residue is equally likely. */
    uint32_t b = (uint32_t)bound, threshold = (uint32_t)(-b) % b;
    for (;;) {
      uint32_t x = rc__rng_next32(r);
      if (x >= threshold) return x % b;
    }
  }
  uint64_t threshold = (uint64_t)(-bound) % bound;
  for (;;) {
    uint64_t x = rc__rng_next64(r);
    if (x >= threshold) return x % bound;
  }
}

float rc__rng_uniform(rc_rng *r) { return (float)(rc__rng_next32(r) >> 8) * (1.0f / 16777216.0f); }

void rc__rng_shuffle_i64(rc_rng *r, int64_t *v, int64_t n) {
  for (int64_t i = n - 1; i > 0; i--) {
    int64_t j = (int64_t)rc__rng_below(r, (uint64_t)i + 1);
    int64_t t = v[i];
    v[i] = v[j];
    v[j] = t;
  }
}

static void put_le64(uint8_t *p, uint64_t v) {
  for (int i = 0; i < 8; i++) p[i] = (uint8_t)(v >> (8 * i));
}

static uint64_t get_le64(const uint8_t *p) {
  uint64_t v = 0;
  for (int i = 7; i >= 0; i--) v = (v << 8) | p[i];
  return v;
}

void rc__rng_save(uint8_t out[RC_RNG_STATE_BYTES], const rc_rng *r) {
  put_le64(out, r->state);
  put_le64(out + 8, r->inc);
}

rc_status rc__rng_load(rc_rng *r, const uint8_t in[RC_RNG_STATE_BYTES], rc_err *e) {
  uint64_t inc = get_le64(in + 8);
  if (!(inc & 1u))
    return rc__fail(e, RC_ERR_FORMAT, "random generator state: increment %llu is even, not a saved PCG32 state",
                    (unsigned long long)inc);
  r->state = get_le64(in);
  r->inc = inc;
  return RC_OK;
}
