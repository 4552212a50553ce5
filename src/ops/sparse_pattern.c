/* See sparse.h: building a weight pattern and choosing whether it is used. */
#include <limits.h>

#include "ops/kernel_choice.h"
#include "ops/op.h"
#include "ops/sparse.h"

rc_status rc__wpattern_build(rc__wpattern *p, rc_arena *a, const uint8_t *keep, int64_t rows, int64_t cols,
                             rc_err *e) {
  if (rows < 1 || cols < 1 || cols > INT_MAX)
    return rc__fail(e, RC_ERR_SHAPE, "weight pattern of %lld rows and %lld columns is not supported",
                    (long long)rows, (long long)cols);
  int64_t nnz = 0;
  for (int64_t i = 0; i < rows * cols; i++) nnz += keep[i] != 0;
  int64_t *start = rc__arena_alloc(a, sizeof(int64_t) * (size_t)(rows + 1));
  int32_t *col = rc__arena_alloc(a, sizeof(int32_t) * (size_t)(nnz ? nnz : 1));
  if (!start || !col) return rc__fail(e, RC_ERR_NOMEM, "out of memory for a weight pattern");
  int64_t j = 0;
  for (int64_t r = 0; r < rows; r++) {
    start[r] = j;
    for (int64_t c = 0; c < cols; c++)
      if (keep[r * cols + c]) col[j++] = (int32_t)c;
  }
  start[rows] = j;
  p->rows = rows;
  p->cols = cols;
  p->nnz = nnz;
  p->start = start;
  p->col = col;
  p->density = (double)nnz / ((double)rows * (double)cols);
  p->nm = NULL;
  return RC_OK;
}

const rc__wpattern *rc__sparse_pick(const rc_kernel *k, double max_density) {
  const rc__wpattern *p = k->pattern;
  if (!p) return NULL;
  const rc__sparse_mode mode = rc__sparse_choice();
  if (mode == RC_SPARSE_NEVER || (mode == RC_SPARSE_AUTO && p->density > max_density)) return NULL;
  return p;
}
