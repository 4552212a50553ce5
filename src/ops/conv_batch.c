/* Conv over a chunk of samples at once: the chunk's patches are unfolded
 * side by side into one column matrix (C*K, nb*P), so each group takes one
 * GEMM with nb*P columns instead of nb GEMMs of P columns. Small feature
 * maps (8x8 and below) otherwise give GEMMs too small to run near the
 * library's speed or to split over two cores; one wide GEMM does both, and
 * OpenBLAS threads it. A 1x1 convolution's "unfolding" is a plain copy of
 * the channels into the same layout. The result matrix (M, nb*P) is copied
 * back into (nb, M, P) with the bias added. */
#include <cblas.h>
#include <string.h>

#include "ops/conv_impl.h"

/* Columns one GEMM should see, and the most workspace the chunk may take. */
#define CHUNK_COLUMNS 4096
#define CHUNK_BYTES ((size_t)32 << 20)

/* Parallel loops over rows only when there is enough to share. */
#define PARALLEL_FLOATS 32768

int64_t rc__conv_chunk(const rc__conv_geom *g) {
  const int64_t P = g->out_sp;
  if (rc__conv_depthwise(g) || P <= 0 || g->N <= 1 || g->Cg * g->K <= 0) return 1;
  int64_t nb = (CHUNK_COLUMNS + P - 1) / P;
  if (nb > g->N) nb = g->N;
  const size_t per = sizeof(float) * (size_t)(g->C * g->K + g->M) * (size_t)P;
  if (per * (size_t)nb > CHUNK_BYTES) nb = (int64_t)(CHUNK_BYTES / per);
  return nb > 1 ? nb : 1;
}

size_t rc__conv_chunk_bytes(const rc__conv_geom *g, int64_t nb) {
  return sizeof(float) * (size_t)(g->C * g->K + g->M) * (size_t)(nb * g->out_sp);
}

/* col (C*K, cnt*P) <- the unfolded samples x[0..cnt) (C, in_sp) each. */
static void unfold_chunk(float *col, const rc__conv_geom *g, const float *x, int64_t cnt) {
  const int64_t L = cnt * g->out_sp;
#pragma omp parallel for schedule(static) if (cnt * g->C * g->K * g->out_sp > PARALLEL_FLOATS)
  for (int64_t j = 0; j < cnt; j++) rc__unfold(col + j * g->out_sp, L, x + j * g->C * g->in_sp, &g->p, g->C);
}

/* y (cnt, M, P) = yb (M, cnt*P) regrouped, plus the bias of each channel. */
static void scatter_rows(float *y, const float *yb, const float *b, const rc__conv_geom *g, int64_t cnt) {
  const int64_t M = g->M, P = g->out_sp, L = cnt * P;
#pragma omp parallel for schedule(static) if (cnt * M * P > PARALLEL_FLOATS)
  for (int64_t r = 0; r < cnt * M; r++) {
    const int64_t j = r / M, m = r % M;
    const float *src = yb + m * L + j * P;
    float *dst = y + r * P;
    if (!b) {
      memcpy(dst, src, sizeof(float) * (size_t)P);
      continue;
    }
    const float v = b[m];
    for (int64_t i = 0; i < P; i++) dst[i] = src[i] + v;
  }
}

/* dyb (M, cnt*P) <- dy (cnt, M, P) regrouped: the layout of scatter_rows' source. */
static void gather_rows(float *dyb, const float *dy, const rc__conv_geom *g, int64_t cnt) {
  const int64_t M = g->M, P = g->out_sp, L = cnt * P;
#pragma omp parallel for schedule(static) if (cnt * M * P > PARALLEL_FLOATS)
  for (int64_t r = 0; r < cnt * M; r++)
    memcpy(dyb + (r % M) * L + (r / M) * P, dy + r * P, sizeof(float) * (size_t)P);
}

/* x (N,C,in...), W (M,C/G,k...), B (M) -> y (N,M,out...), nb samples per GEMM.
 * work holds col (C*K, nb*P) then yb (M, nb*P). */
void rc__conv_chunk_forward(const rc__conv_geom *g, int64_t nb, float *y, const float *x, const float *w,
                            const float *b, float *work) {
  const int64_t CgK = g->Cg * g->K, P = g->out_sp;
  float *col = work, *yb = work + g->C * g->K * nb * P;
  for (int64_t n0 = 0; n0 < g->N; n0 += nb) {
    const int64_t cnt = g->N - n0 < nb ? g->N - n0 : nb, L = cnt * P;
    unfold_chunk(col, g, x + n0 * g->C * g->in_sp, cnt);
    for (int64_t grp = 0; grp < g->G; grp++)
      cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, (int)g->Mg, (int)L, (int)CgK, 1.0f,
                  w + grp * g->Mg * CgK, (int)CgK, col + grp * CgK * L, (int)L, 0.0f, yb + grp * g->Mg * L,
                  (int)L);
    scatter_rows(y + n0 * g->M * P, yb, b, g, cnt);
  }
}

/* dx (N,C,in...) += W^T . dy folded back; dW (M, Cg*K) += dy . unfold(x)^T,
 * nb samples per GEMM. Either gradient may be NULL. The column matrix holds
 * the unfolded input for dW first, then dW's use done, the input gradient's
 * columns, which are folded onto dx sample by sample. */
void rc__conv_chunk_backward(const rc__conv_geom *g, int64_t nb, float *dx, float *dw, const float *x,
                             const float *w, const float *dy, float *work) {
  const int64_t CgK = g->Cg * g->K, P = g->out_sp;
  float *col = work, *dyb = work + g->C * g->K * nb * P;
  for (int64_t n0 = 0; n0 < g->N; n0 += nb) {
    const int64_t cnt = g->N - n0 < nb ? g->N - n0 : nb, L = cnt * P;
    gather_rows(dyb, dy + n0 * g->M * P, g, cnt);
    if (dw) {
      unfold_chunk(col, g, x + n0 * g->C * g->in_sp, cnt);
      for (int64_t grp = 0; grp < g->G; grp++)
        cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, (int)g->Mg, (int)CgK, (int)L, 1.0f,
                    dyb + grp * g->Mg * L, (int)L, col + grp * CgK * L, (int)L, 1.0f, dw + grp * g->Mg * CgK,
                    (int)CgK);
    }
    if (!dx) continue;
    for (int64_t grp = 0; grp < g->G; grp++)
      cblas_sgemm(CblasRowMajor, CblasTrans, CblasNoTrans, (int)CgK, (int)L, (int)g->Mg, 1.0f,
                  w + grp * g->Mg * CgK, (int)CgK, dyb + grp * g->Mg * L, (int)L, 0.0f, col + grp * CgK * L,
                  (int)L);
    float *dxc = dx + n0 * g->C * g->in_sp;
#pragma omp parallel for schedule(static) if (cnt * g->C * g->K * P > PARALLEL_FLOATS)
    for (int64_t j = 0; j < cnt; j++) rc__fold_add(dxc + j * g->C * g->in_sp, col + j * P, L, &g->p, g->C);
  }
}
