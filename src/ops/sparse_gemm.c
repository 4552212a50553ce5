/* Gemm and MatMul with a sparse weight (see sparse.h): sample rows against
 * the kept weights in compressed rows. Forward and the input gradient are
 * a gather (dot of a weight row's kept entries with a sample row) or a
 * scatter (a sample's entry times a weight row's kept entries), whichever
 * walks the weight in its storage order; the weight gradient visits kept
 * positions only. */
#include "ops/sparse.h"

/* The density limit, from callgrind instruction counts of forward plus both
 * gradients (64 sample rows, one thread, random patterns, transB = 1)
 * against cblas_sgemm: 512 -> 256 took 6.9M instructions dense and 13.5M
 * at 5% kept, 1024 -> 1024 54.5M dense and 103.6M at 5% kept, so sparse
 * rows break even near 2.6% kept by count (their indexed loads do not
 * vectorise). Timings of 512 -> 256 (min of 9, interleaved, one thread)
 * put it a little higher: 1.60x at 2% kept, 0.73x at 5%. 2:4 patterns stay
 * dense (18 times the dense count through CSR). */
const double rc__sparse_gemm_max_density = 0.03;

/* One pass of the sample rows: gather (out_i[r] += alpha * <W row r, in_i>)
 * or scatter (out_i[c] += alpha * in_i[r] * W[r,c]). */
static void rows_pass(int scatter, const rc__wpattern *p, const float *w, float alpha, int64_t S, const float *in,
                      int64_t ldi, float *out, int64_t ldo) {
#pragma omp parallel for schedule(static) if (S > 1)
  for (int64_t i = 0; i < S; i++) {
    const float *ii = in + i * ldi;
    float *oi = out + i * ldo;
    for (int64_t r = 0; r < p->rows; r++) {
      const float *wr = w + r * p->cols;
      const int64_t j0 = p->start[r], j1 = p->start[r + 1];
      if (scatter) {
        const float a = alpha * ii[r];
        for (int64_t j = j0; j < j1; j++) oi[p->col[j]] += a * wr[p->col[j]];
        continue;
      }
      float acc = 0;
      for (int64_t j = j0; j < j1; j++) acc += wr[p->col[j]] * ii[p->col[j]];
      oi[r] += alpha * acc;
    }
  }
}

void rc__sparse_rows_gather(const rc__wpattern *p, const float *w, float alpha, int64_t S, const float *v,
                            int64_t ldv, float *out, int64_t ldo) {
  rows_pass(0, p, w, alpha, S, v, ldv, out, ldo);
}

void rc__sparse_rows_scatter(const rc__wpattern *p, const float *w, float alpha, int64_t S, const float *u,
                             int64_t ldu, float *out, int64_t ldo) {
  rows_pass(1, p, w, alpha, S, u, ldu, out, ldo);
}

void rc__sparse_rows_wgrad(const rc__wpattern *p, float *dw, float alpha, int64_t S, const float *u, int64_t ldu,
                           const float *v, int64_t ldv) {
#pragma omp parallel for schedule(dynamic, 4) if (p->rows > 1)
  for (int64_t r = 0; r < p->rows; r++) {
    const int64_t j0 = p->start[r], j1 = p->start[r + 1];
    float *dwr = dw + r * p->cols;
    for (int64_t i = 0; i < S; i++) {
      const float a = alpha * u[i * ldu + r];
      const float *vi = v + i * ldv;
      for (int64_t j = j0; j < j1; j++) dwr[p->col[j]] += a * vi[p->col[j]];
    }
  }
}
