/* Weight patterns of sparse students and the kernels that use them.
 *
 * A pruned weight's frozen zeros cannot be told from trainable weights that
 * happen to be zero by looking at values, so the pattern comes from the
 * training masks: the run builds it once (rc_plan_opts.patterns) and
 * hands it to the kernel through rc_kernel.pattern. The pattern lists the
 * kept positions of the weight's storage as rows (its first axis) of
 * columns (the rest, flattened): compressed sparse rows. Values stay in the
 * dense weight tensor and kernels read them through the pattern, so the
 * optimizer and export see the same tensor either way.
 *
 * Every sparse kernel computes forward and the input gradient from the
 * kept weights alone and the weight gradient only at kept positions:
 * frozen positions of the weight gradient are never written. Results are
 * deterministic and do not depend on the thread count (each output element
 * is summed by one thread in a fixed order). */
#ifndef RC_OPS_SPARSE_H
#define RC_OPS_SPARSE_H

#include <stdint.h>

#include "core/arena.h"
#include "core/status.h"

typedef struct rc__wpattern {
  int64_t rows, cols, nnz;
  const int64_t *start; /* rows + 1 offsets into col */
  const int32_t *col;   /* kept columns of each row, ascending */
  double density;       /* nnz / (rows * cols) */
  const struct rc__nm *nm; /* N:M structure (nm.h), or NULL */
} rc__wpattern;

/* Pattern of keep (rows * cols bytes, non-zero = kept), arrays in arena a. */
rc_status rc__wpattern_build(rc__wpattern *p, rc_arena *a, const uint8_t *keep, int64_t rows, int64_t cols,
                             rc_err *e);

/* Density at or below which the sparse Gemm/MatMul kernels run (measured;
 * see sparse_gemm.c). Conv's limit depends on the map size
 * (rc__sparse_conv_density_limit, sparse_conv.c). */
extern const double rc__sparse_gemm_max_density;

/* The pattern a kernel should use: k's pattern when it exists and its
 * density is at most max_density, unless RECOUP_CONV_PATH says otherwise
 * (kernel_choice.h); NULL means the dense path runs. */
struct rc_kernel;
const rc__wpattern *rc__sparse_pick(const struct rc_kernel *k, double max_density);

/* ---- sparse_gemm.c: a weight W (rows, cols) against S rows of samples ----
 * gather:  out_i[r] += alpha * sum over kept (r, c) of W[r,c] * v_i[c]
 * scatter: out_i[c] += alpha * sum over kept (r, c) of W[r,c] * u_i[r]
 * wgrad:   dW[r,c]  += alpha * sum over i of u_i[r] * v_i[c], kept (r, c) only
 * Row i of u, v and out starts at i * ld. Threads split the rows i (gather,
 * scatter) or the weight rows r (wgrad). */
void rc__sparse_rows_gather(const rc__wpattern *p, const float *w, float alpha, int64_t S, const float *v,
                            int64_t ldv, float *out, int64_t ldo);
void rc__sparse_rows_scatter(const rc__wpattern *p, const float *w, float alpha, int64_t S, const float *u,
                             int64_t ldu, float *out, int64_t ldo);
void rc__sparse_rows_wgrad(const rc__wpattern *p, float *dw, float alpha, int64_t S, const float *u, int64_t ldu,
                           const float *v, int64_t ldv);

#endif
