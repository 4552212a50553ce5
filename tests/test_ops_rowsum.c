/* The vectorised row sums (ops/rowsum.c) against plain double-precision sums
 * on lengths around the 16-lane width, and their independence from where a
 * row starts in memory (alignment). The reference is the definition of each
 * sum evaluated in double, element by element. */
#include <stdint.h>

#include "ops/rowsum.h"
#include "test.h"

#define MAXN 1037

static float xs[MAXN + 3], ds[MAXN + 3];

static void fill(void) {
  uint32_t s = 12345u;
  for (int i = 0; i < MAXN + 3; i++) {
    s = s * 1664525u + 1013904223u; /* a linear congruential generator (Numerical Recipes' constants) */
    xs[i] = (float)((double)(s >> 8) / (double)(1u << 24) * 4.0 - 1.5);
    s = s * 1664525u + 1013904223u;
    ds[i] = (float)((double)(s >> 8) / (double)(1u << 24) * 2.0 - 1.0);
  }
}

static void sums_match_double_reference(void) {
  static const int64_t lens[] = {0, 1, 3, 15, 16, 17, 31, 32, 33, 100, 1024, MAXN};
  const float m = 0.375f;
  for (int off = 0; off < 3; off++)
    for (size_t i = 0; i < sizeof lens / sizeof lens[0]; i++) {
      const int64_t n = lens[i];
      const float *x = xs + off, *d = ds + off;
      double s = 0, sq = 0, dot = 0, mag = 0;
      for (int64_t j = 0; j < n; j++) {
        s += x[j];
        sq += ((double)x[j] - m) * ((double)x[j] - m);
        dot += (double)d[j] * ((double)x[j] - m);
        mag += fabs((double)x[j]) + fabs((double)d[j]);
      }
      /* float lanes: error bounded by a few ulps of the magnitudes summed */
      double tol = 1e-6 * (mag + 1.0);
      double got_s = rc__row_sum(x, n), got_sq = rc__row_sq_dev(x, n, m), got_dot = rc__row_dot_dev(d, x, n, m);
      printf("n %4lld offset %d: sum %.9g vs %.9g, sq %.9g vs %.9g, dot %.9g vs %.9g\n", (long long)n, off, got_s,
             s, got_sq, sq, got_dot, dot);
      CHECK_NEAR(got_s, s, tol, 0);
      CHECK_NEAR(got_sq, sq, 4 * tol, 0);
      CHECK_NEAR(got_dot, dot, 4 * tol, 0);
    }
}

/* The same values at another address give the same bits: lanes follow the
 * element index, not the alignment. */
static void alignment_does_not_change_bits(void) {
  static float a[MAXN], b[MAXN + 1];
  for (int i = 0; i < MAXN; i++) a[i] = b[i + 1] = xs[i];
  double sa = rc__row_sum(a, MAXN), sb = rc__row_sum(b + 1, MAXN);
  printf("sum at two alignments: %.17g vs %.17g\n", sa, sb);
  CHECK(sa == sb);
}

int main(void) {
  fill();
  RUN(sums_match_double_reference);
  RUN(alignment_does_not_change_bits);
  return TEST_REPORT();
}
