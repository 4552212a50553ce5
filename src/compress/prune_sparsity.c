/* Magnitude and N:M sparsity: which weights become zero (see prune.h). */
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "compress/prune_internal.h"
#include "core/alloc.h"

/* Order of (|w|, position): float bits of |w| above a 32-bit position. */
static int key_cmp(const void *pa, const void *pb) {
  uint64_t a = *(const uint64_t *)pa, b = *(const uint64_t *)pb;
  return (a > b) - (a < b);
}

static uint64_t abs_bits(float f) {
  uint32_t u;
  memcpy(&u, &f, 4);
  return u & 0x7fffffffu;
}

/* Zero the round(S * n) weights of smallest |w| among `sel` layers (all at
 * once, or one layer when only one is selected); ties go to the lower
 * position so the count is exact. */
rc_status rc__prune_zero_smallest(rc_graph *g, const layer *ls, const int *sel, int ns, double frac, rc_err *e) {
  int64_t total = 0;
  for (int i = 0; i < ns; i++) total += rc_tensor_numel(&g->values[ls[sel[i]].value].decl);
  if (total == 0) return RC_OK;
  if (total > (int64_t)UINT32_MAX)
    return rc__fail(e, RC_ERR_LIMIT, "%s: more than 2^32 prunable weights", g->path);
  uint64_t *keys = rc__malloc(sizeof(uint64_t) * (size_t)total);
  if (!keys) return rc__fail(e, RC_ERR_NOMEM, "out of memory for %lld weight keys", (long long)total);
  int64_t at = 0;
  for (int i = 0; i < ns; i++) {
    const rc_tensor *t = &g->values[ls[sel[i]].value].decl;
    const float *w = t->data;
    for (int64_t k = 0; k < rc_tensor_numel(t); k++, at++) keys[at] = abs_bits(w[k]) << 32 | (uint64_t)at;
  }
  qsort(keys, (size_t)total, sizeof *keys, key_cmp);
  int64_t kill = (int64_t)floor(frac * (double)total + 0.5);
  /* Positions back to (layer, element): walk the layer offsets. */
  int64_t *start = rc__malloc(sizeof(int64_t) * (size_t)(ns + 1));
  if (!start) {
    rc__free(keys);
    return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  }
  start[0] = 0;
  for (int i = 0; i < ns; i++) start[i + 1] = start[i] + rc_tensor_numel(&g->values[ls[sel[i]].value].decl);
  for (int64_t k = 0; k < kill; k++) {
    int64_t pos = (int64_t)(keys[k] & 0xffffffffu);
    int lo = 0, hi = ns - 1;
    while (lo < hi) {
      int mid = (lo + hi + 1) / 2;
      if (start[mid] <= pos) lo = mid;
      else hi = mid - 1;
    }
    ((float *)g->values[ls[sel[lo]].value].decl.data)[pos - start[lo]] = 0.0f;
  }
  rc__free(start);
  rc__free(keys);
  return RC_OK;
}

/* In every run of m weights along axis keep the n of largest |w| (ties: the
 * lower index stays). Returns 0 when the axis length is not a multiple of m. */
int rc__prune_keep_n_of_m(rc_tensor *t, int axis, int n, int m) {
  int64_t len = t->dims[axis], inner = 1, outer = 1;
  if (len % m) return 0;
  for (int d = axis + 1; d < t->rank; d++) inner *= t->dims[d];
  for (int d = 0; d < axis; d++) outer *= t->dims[d];
  float *w = t->data;
  for (int64_t o = 0; o < outer; o++)
    for (int64_t in = 0; in < inner; in++)
      for (int64_t g0 = 0; g0 < len; g0 += m) {
        unsigned char drop[256];
        for (int k = 0; k < m; k++) {
          float a = fabsf(w[(o * len + g0 + k) * inner + in]);
          int beaten = 0;
          for (int j = 0; j < m; j++) {
            float b = fabsf(w[(o * len + g0 + j) * inner + in]);
            beaten += b > a || (b == a && j < k);
          }
          drop[k] = beaten >= n;
        }
        for (int k = 0; k < m; k++)
          if (drop[k]) w[(o * len + g0 + k) * inner + in] = 0.0f;
      }
  return 1;
}
