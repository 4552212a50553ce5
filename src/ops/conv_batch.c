/* Conv over chunks of a few samples: a chunk's patches are unfolded side by
 * side into one column matrix (C*K, nb*P), so each group takes one GEMM with
 * nb*P columns instead of nb GEMMs of P columns. Small feature maps (8x8 and
 * below) otherwise give GEMMs too narrow to run near the library's speed. A
 * 1x1 convolution's "unfolding" is a plain copy of the channels into that
 * layout. The result matrix (M, nb*P) is copied back into (nb, M, P) with
 * the bias added. Chunks stay small enough for the column matrix to sit in
 * the core's cache (a chunk as wide as the batch was slower: its column
 * matrix went out to memory), and the chunks are shared among threads, each
 * with single-threaded GEMMs and, for backward, a private weight gradient
 * summed in thread order afterwards (deterministic for a thread count). */
#include <cblas.h>
#include <omp.h>
#include <string.h>

#include "ops/conv_impl.h"
#include "ops/epilogue.h"

/* Columns a chunk aims at, and the most a chunk's buffers may take. */
#define CHUNK_COLUMNS 256
#define CHUNK_BYTES ((size_t)1 << 20)
/* Output cells below which a 1x1 convolution takes chunks. */
#define DIRECT_CHUNK_BELOW 16

int64_t rc__conv_chunk(const rc__conv_geom *g) {
  const int64_t P = g->out_sp;
  if (rc__conv_depthwise(g) || P <= 0 || g->N <= 1 || g->Cg * g->K <= 0) return 1;
  /* A 1x1 convolution needs no unfolding one sample at a time, while a
   * chunk copies its input and output: instruction counts (callgrind, 64
   * samples, mobilenet_v2 layers) favour the chunk at 2x2 maps (0.66x
   * forward, 0.64x backward) and the plain GEMMs at 4x4 (1.37x, 1.08x). */
  if (g->direct && P >= DIRECT_CHUNK_BELOW) return 1;
  int64_t nb = (CHUNK_COLUMNS + P - 1) / P;
  if (nb > g->N) nb = g->N;
  const size_t per = sizeof(float) * (size_t)(g->C * g->K + g->M) * (size_t)P;
  if (per * (size_t)nb > CHUNK_BYTES) nb = (int64_t)(CHUNK_BYTES / per);
  return nb > 1 ? nb : 1;
}

static size_t chunk_floats(const rc__conv_geom *g, int64_t nb) {
  return (size_t)(g->C * g->K + g->M) * (size_t)(nb * g->out_sp);
}

static size_t dw_floats(const rc__conv_geom *g) { return (size_t)g->M * (size_t)(g->Cg * g->K); }

size_t rc__conv_chunk_bytes(const rc__conv_geom *g, int64_t nb, int backward, int threads) {
  return sizeof(float) * (size_t)threads * (chunk_floats(g, nb) + (backward ? dw_floats(g) : 0));
}

int rc__conv_chunk_threads(const rc__conv_geom *g, int64_t nb, int backward, size_t work_bytes) {
  int64_t t = omp_get_max_threads(), chunks = (g->N + nb - 1) / nb;
  if (t > chunks) t = chunks;
  while (t > 1 && rc__conv_chunk_bytes(g, nb, backward, (int)t) > work_bytes) t--;
  return t > 1 ? (int)t : 1;
}

/* col (C*K, cnt*P) <- the unfolded samples x[0..cnt) (C, in_sp) each. */
static void unfold_chunk(float *col, const rc__conv_geom *g, const float *x, int64_t cnt) {
  const int64_t L = cnt * g->out_sp;
  for (int64_t j = 0; j < cnt; j++) rc__unfold(col + j * g->out_sp, L, x + j * g->C * g->in_sp, &g->p, g->C);
}

/* y (cnt, M, P) = yb (M, cnt*P) regrouped, plus the bias of each channel. */
static void scatter_rows(float *y, const float *yb, const float *b, const rc__conv_geom *g, int64_t cnt) {
  const int64_t M = g->M, P = g->out_sp, L = cnt * P;
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
  for (int64_t r = 0; r < cnt * M; r++)
    memcpy(dyb + (r % M) * L + (r / M) * P, dy + r * P, sizeof(float) * (size_t)P);
}

static int64_t chunk_count(const rc__conv_geom *g, int64_t nb, int64_t n0) {
  return g->N - n0 < nb ? g->N - n0 : nb;
}

/* Samples [n0, n0+cnt): y = b + W . unfold(x), group by group. */
static void forward_chunk(const rc__conv_geom *g, int64_t nb, int64_t n0, float *y, const float *x, const float *w,
                          const float *b, float *work, const rc__epilogue *ep) {
  const int64_t CgK = g->Cg * g->K, P = g->out_sp, cnt = chunk_count(g, nb, n0), L = cnt * P;
  float *col = work, *yb = work + g->C * g->K * nb * P;
  unfold_chunk(col, g, x + n0 * g->C * g->in_sp, cnt);
  for (int64_t grp = 0; grp < g->G; grp++)
    cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, (int)g->Mg, (int)L, (int)CgK, 1.0f,
                w + grp * g->Mg * CgK, (int)CgK, col + grp * CgK * L, (int)L, 0.0f, yb + grp * g->Mg * L, (int)L);
  scatter_rows(y + n0 * g->M * P, yb, b, g, cnt);
  if (ep)
    rc__epilogue_apply(ep, y, n0 * g->M, (n0 + cnt) * g->M, g->M, P); /* the chunk's rows are still in cache */
}

/* x (N,C,in...), W (M,C/G,k...), B (M) -> y (N,M,out...). */
void rc__conv_chunk_forward(const rc__conv_geom *g, int64_t nb, int threads, float *y, const float *x,
                            const float *w, const float *b, float *work, const rc__epilogue *ep) {
  const size_t per = chunk_floats(g, nb);
  const int64_t chunks = (g->N + nb - 1) / nb;
#pragma omp parallel for num_threads(threads) schedule(static) if (threads > 1)
  for (int64_t ch = 0; ch < chunks; ch++)
    forward_chunk(g, nb, ch * nb, y, x, w, b, work + (size_t)omp_get_thread_num() * per, ep);
}

/* Samples [n0, n0+cnt): dw += dy . unfold(x)^T, then the column matrix
 * takes W^T . dy, folded onto dx sample by sample. */
static void backward_chunk(const rc__conv_geom *g, int64_t nb, int64_t n0, float *dx, float *dw, const float *x,
                           const float *w, const float *dy, float *work) {
  const int64_t CgK = g->Cg * g->K, P = g->out_sp, cnt = chunk_count(g, nb, n0), L = cnt * P;
  float *col = work, *dyb = work + g->C * g->K * nb * P;
  gather_rows(dyb, dy + n0 * g->M * P, g, cnt);
  if (dw) {
    unfold_chunk(col, g, x + n0 * g->C * g->in_sp, cnt);
    for (int64_t grp = 0; grp < g->G; grp++)
      cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, (int)g->Mg, (int)CgK, (int)L, 1.0f,
                  dyb + grp * g->Mg * L, (int)L, col + grp * CgK * L, (int)L, 1.0f, dw + grp * g->Mg * CgK,
                  (int)CgK);
  }
  if (!dx) return;
  for (int64_t grp = 0; grp < g->G; grp++)
    cblas_sgemm(CblasRowMajor, CblasTrans, CblasNoTrans, (int)CgK, (int)L, (int)g->Mg, 1.0f, w + grp * g->Mg * CgK,
                (int)CgK, dyb + grp * g->Mg * L, (int)L, 0.0f, col + grp * CgK * L, (int)L);
  for (int64_t j = 0; j < cnt; j++) rc__fold_add(dx + (n0 + j) * g->C * g->in_sp, col + j * P, L, &g->p, g->C);
}

void rc__conv_chunk_backward(const rc__conv_geom *g, int64_t nb, int threads, float *dx, float *dw, const float *x,
                             const float *w, const float *dy, float *work) {
  const size_t per = chunk_floats(g, nb) + dw_floats(g);
  const int64_t chunks = (g->N + nb - 1) / nb;
  if (threads <= 1) {
    for (int64_t ch = 0; ch < chunks; ch++) backward_chunk(g, nb, ch * nb, dx, dw, x, w, dy, work);
    return;
  }
#pragma omp parallel num_threads(threads)
  {
    float *mine = work + (size_t)omp_get_thread_num() * per, *part = dw ? mine + chunk_floats(g, nb) : NULL;
    if (part) memset(part, 0, sizeof(float) * dw_floats(g));
#pragma omp for schedule(static)
    for (int64_t ch = 0; ch < chunks; ch++) backward_chunk(g, nb, ch * nb, dx, part, x, w, dy, mine);
  }
  if (dw)
    for (int t = 0; t < threads; t++) {
      const float *part = work + (size_t)t * per + chunk_floats(g, nb);
      for (size_t i = 0; i < dw_floats(g); i++) dw[i] += part[i];
    }
}
