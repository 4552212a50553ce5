/* Row sums for normalisation statistics and bias gradients. A serial sum
 * (one accumulator) waits on every add; 16 independent lanes let the
 * compiler fill whole vector registers. Lanes are combined in one fixed
 * order and no multiply-add is contracted (ISO C mode), so every clone gives
 * the same bits. target_clones picks the clone once, at load time, from the
 * CPU's features. */
#include "ops/rowsum.h"

#define LANES 16

#if defined(__GNUC__) && defined(__x86_64__) && !defined(__clang__)
#define RC_DISPATCH __attribute__((target_clones("avx512f", "avx2", "default")))
#else
#define RC_DISPATCH
#endif

/* Halves the lanes until one is left: a fixed order, and cheap enough for
 * the short rows of small feature maps. */
static double combine(float *acc) {
  for (int w = LANES / 2; w >= 1; w /= 2)
    for (int l = 0; l < w; l++) acc[l] += acc[l + w];
  return acc[0];
}

static RC_DISPATCH double row_sum(const float *x, int64_t n) {
  float acc[LANES] = {0};
  int64_t j = 0;
  for (; j + LANES <= n; j += LANES)
    for (int l = 0; l < LANES; l++) acc[l] += x[j + l];
  for (int l = 0; j < n; j++, l++) acc[l] += x[j];
  return combine(acc);
}

static RC_DISPATCH double row_sq_dev(const float *x, int64_t n, float m) {
  float acc[LANES] = {0};
  int64_t j = 0;
  for (; j + LANES <= n; j += LANES)
    for (int l = 0; l < LANES; l++) {
      float d = x[j + l] - m;
      acc[l] += d * d;
    }
  for (int l = 0; j < n; j++, l++) {
    float d = x[j] - m;
    acc[l] += d * d;
  }
  return combine(acc);
}

static RC_DISPATCH double row_dot_dev(const float *dy, const float *x, int64_t n, float m) {
  float acc[LANES] = {0};
  int64_t j = 0;
  for (; j + LANES <= n; j += LANES)
    for (int l = 0; l < LANES; l++) acc[l] += dy[j + l] * (x[j + l] - m);
  for (int l = 0; j < n; j++, l++) acc[l] += dy[j] * (x[j] - m);
  return combine(acc);
}

/* The dispatched functions are file-local: GCC gives an exported cloned
 * symbol default visibility whatever the preset, and these are internal. */
double rc__row_sum(const float *x, int64_t n) { return row_sum(x, n); }
double rc__row_sq_dev(const float *x, int64_t n, float m) { return row_sq_dev(x, n, m); }
double rc__row_dot_dev(const float *dy, const float *x, int64_t n, float m) { return row_dot_dev(dy, x, n, m); }
