/* recoup/data.h: picking a seeded subset of samples. */
#include "recoup/data.h"

#include <stdlib.h>

#include "core/rng.h"

static int ascending(const void *a, const void *b) {
  int64_t x = *(const int64_t *)a, y = *(const int64_t *)b;
  return (x > y) - (x < y);
}

void rc_data_subset(int64_t *perm, int64_t n, int64_t count, uint64_t seed) {
  for (int64_t i = 0; i < n; i++) perm[i] = i;
  rc_rng r;
  rc__rng_seed(&r, seed, 0);
  rc__rng_shuffle_i64(&r, perm, n);
  qsort(perm, (size_t)count, sizeof *perm, ascending);
}
