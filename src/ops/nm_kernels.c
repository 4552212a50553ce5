/* The strip kernels of nm.h. Each takes a strip of 64 columns at a time:
 * the gather keeps one output row's strip in registers while it adds the
 * row's few kept entries (a broadcast weight times a loaded source strip
 * each), so every output value is loaded and stored once per strip; the
 * weight gradient runs four kept entries of a row together against one
 * load of the row's gradient strip, each entry summed in 16 lanes.
 *
 * Every value is summed in the same order with fused multiply-adds at
 * every instruction set (the lane layout of the weight gradient is fixed at
 * 16, two 8-lane registers under AVX2), so results are the same bits on
 * every level and for every thread count; callers split rows or samples
 * between threads. */
#include <math.h>

#include "ops/kernel_choice.h"
#include "ops/nm.h"
#include "ops/sparse.h"

#if defined(__GNUC__) && defined(__x86_64__)
#include <immintrin.h>
#define NM_X86 1
#endif

#define STRIP 64 /* columns per strip */
#define LANES 16 /* lanes of each weight-gradient sum */
#define GROUP 4  /* kept entries per weight-gradient pass */

/* The baseline level: one column at a time, the same order of fused adds. */
static inline void gather_cols(const int64_t *start, const int32_t *idx, const float *wr, int64_t wstep, int64_t r,
                               const float *src, const int64_t *roff, int64_t lds, float *o, int64_t j0,
                               int64_t j1, int accumulate) {
  for (int64_t j = j0; j < j1; j++) {
    float acc = accumulate ? o[j] : 0.0f;
    for (int64_t e = start[r]; e < start[r + 1]; e++)
      acc = fmaf(wr[idx[e] * wstep], src[(roff ? roff[idx[e]] : idx[e] * lds) + j], acc);
    o[j] = acc;
  }
}

/* Lane sums of GROUP entries of one row, fixed-order tree at the end. */
static float lane_total(float *lane) {
  for (int w = LANES / 2; w >= 1; w /= 2)
    for (int l = 0; l < w; l++) lane[l] += lane[l + w];
  return lane[0];
}

/* Adds columns [j0, j1) to the weight gradient's lanes one at a time
 * (lane = column mod LANES counted from 0). */
static inline void wgrad_cols(float lanes[GROUP][LANES], int cnt, const float *u, const float *const *v, int64_t o,
                              int64_t j0, int64_t j1) {
  for (int64_t j = j0; j < j1; j++)
    for (int q = 0; q < cnt; q++) lanes[q][j % LANES] = fmaf(u[j], v[q][o + j], lanes[q][j % LANES]);
}

#ifdef NM_X86
/* Gather with VW-float registers of type VT: full strips with the count of
 * registers known at compile time, NR rows at a time (their sums are
 * independent, so more of them keep the multiply-add units busy while
 * loads wait), then the last strip with a masked last register
 * (MLOAD/MSTORE of the first `rem` lanes, MASK(rem) making the mask). */
#define NM_GATHER(isa, attr, NR, VT, VW, MT, LOADU, STOREU, SET1, FMA, ZERO, MASK, MLOAD, MSTORE)                 \
  /* rows [r, r + nr) of one full strip at column j0 (nr is a constant after inlining) */                         \
  static inline __attribute__((always_inline))                                                                    \
  attr void strip_##isa(int nr, const int64_t *start, const int32_t *idx, int64_t r, int64_t r0, const float *w,  \
                        int64_t wrow, int64_t wstep, const float *src, const int64_t *roff, int64_t lds,          \
                        float *out, int64_t ldo, int64_t j0, int accumulate) {                                    \
    enum { NV = STRIP / VW };                                                                                     \
    VT acc[NR][NV];                                                                                               \
    int64_t n = start[r + 1] - start[r];                                                                          \
    for (int q = 0; q < nr; q++) {                                                                                \
      const float *o = out + (r + q - r0) * ldo + j0;                                                             \
      for (int v = 0; v < NV; v++) acc[q][v] = accumulate ? LOADU(o + v * VW) : ZERO();                           \
      if (start[r + q + 1] - start[r + q] < n) n = start[r + q + 1] - start[r + q];                               \
    }                                                                                                             \
    for (int64_t t = 0; t < n; t++)                                                                               \
      for (int q = 0; q < nr; q++) {                                                                              \
        const int64_t e = start[r + q] + t;                                                                       \
        const VT wv = SET1(w[(r + q) * wrow + idx[e] * wstep]);                                                   \
        const float *s = src + (roff ? roff[idx[e]] : idx[e] * lds) + j0;                                         \
        for (int v = 0; v < NV; v++) acc[q][v] = FMA(wv, LOADU(s + v * VW), acc[q][v]);                           \
      }                                                                                                           \
    for (int q = 0; q < nr; q++) {                                                                                \
      for (int64_t e = start[r + q] + n; e < start[r + q + 1]; e++) {                                             \
        const VT wv = SET1(w[(r + q) * wrow + idx[e] * wstep]);                                                   \
        const float *s = src + (roff ? roff[idx[e]] : idx[e] * lds) + j0;                                         \
        for (int v = 0; v < NV; v++) acc[q][v] = FMA(wv, LOADU(s + v * VW), acc[q][v]);                           \
      }                                                                                                           \
      float *o = out + (r + q - r0) * ldo + j0;                                                                   \
      for (int v = 0; v < NV; v++) STOREU(o + v * VW, acc[q][v]);                                                 \
    }                                                                                                             \
  }                                                                                                               \
  static attr void gather_##isa(const int64_t *start, const int32_t *idx, int64_t r0, int64_t r1, const float *w, \
                                int64_t wrow, int64_t wstep, const float *src, const int64_t *roff, int64_t lds,  \
                                float *out, int64_t ldo, int64_t L, int accumulate) {                             \
    const int64_t full = L - L % STRIP;                                                                           \
    for (int64_t j0 = 0; j0 < full; j0 += STRIP) {                                                                \
      int64_t r = r0;                                                                                             \
      for (; r + NR <= r1; r += NR)                                                                               \
        strip_##isa(NR, start, idx, r, r0, w, wrow, wstep, src, roff, lds, out, ldo, j0, accumulate);             \
      for (; r < r1; r++)                                                                                         \
        strip_##isa(1, start, idx, r, r0, w, wrow, wstep, src, roff, lds, out, ldo, j0, accumulate);              \
    }                                                                                                             \
    if (full == L) return;                                                                                        \
    const int rest = (int)(L - full), nv = (rest + VW - 1) / VW, rem = rest - (nv - 1) * VW;                      \
    const MT mask = MASK(rem);                                                                                    \
    for (int64_t r = r0; r < r1; r++) {                                                                           \
      const float *wr = w + r * wrow;                                                                             \
      float *o = out + (r - r0) * ldo + full;                                                                     \
      /* one register at a time: a loop over a run-time count kept sums in memory */                              \
      for (int v = 0; v < nv - 1; v++) {                                                                          \
        VT acc = accumulate ? LOADU(o + v * VW) : ZERO();                                                         \
        for (int64_t e = start[r]; e < start[r + 1]; e++)                                                         \
          acc = FMA(SET1(wr[idx[e] * wstep]), LOADU(src + (roff ? roff[idx[e]] : idx[e] * lds) + full + v * VW),  \
                    acc);                                                                                         \
        STOREU(o + v * VW, acc);                                                                                  \
      }                                                                                                           \
      const int64_t last = (nv - 1) * VW;                                                                         \
      VT acc = accumulate ? MLOAD(o + last, mask) : ZERO();                                                       \
      for (int64_t e = start[r]; e < start[r + 1]; e++)                                                           \
        acc = FMA(SET1(wr[idx[e] * wstep]),                                                                       \
                  MLOAD(src + (roff ? roff[idx[e]] : idx[e] * lds) + full + last, mask), acc);                    \
      MSTORE(o + last, mask, acc);                                                                                \
    }                                                                                                             \
  }

/* Adds to the weight-gradient lanes of up to GROUP entries over S samples
 * (u and the v[q] step by us and vs), full LANES blocks in registers, the
 * rest one column at a time. */
#define NM_WGRAD(isa, attr, VT, VW, LOADU, STOREU, FMA)                                                   \
  static attr void wgrad_lanes_##isa(float lanes[GROUP][LANES], int cnt, const float *u, int64_t us,      \
                                     const float *const *v, int64_t vs, int64_t L, int64_t S) {           \
    enum { NV = LANES / VW };                                                                             \
    VT acc[GROUP][NV];                                                                                    \
    for (int q = 0; q < cnt; q++)                                                                         \
      for (int k = 0; k < NV; k++) acc[q][k] = LOADU(lanes[q] + k * VW);                                  \
    const int64_t full = L - L % LANES;                                                                   \
    for (int64_t i = 0; i < S; i++) {                                                                     \
      const float *ui = u + i * us;                                                                       \
      const int64_t o = i * vs;                                                                           \
      if (cnt == GROUP)                                                                                   \
        for (int64_t j = 0; j < full; j += LANES)                                                         \
          for (int k = 0; k < NV; k++) {                                                                  \
            const VT uu = LOADU(ui + j + k * VW);                                                         \
            for (int q = 0; q < GROUP; q++) acc[q][k] = FMA(uu, LOADU(v[q] + o + j + k * VW), acc[q][k]); \
          }                                                                                               \
      else                                                                                                \
        for (int64_t j = 0; j < full; j += LANES)                                                         \
          for (int k = 0; k < NV; k++) {                                                                  \
            const VT uu = LOADU(ui + j + k * VW);                                                         \
            for (int q = 0; q < cnt; q++) acc[q][k] = FMA(uu, LOADU(v[q] + o + j + k * VW), acc[q][k]);   \
          }                                                                                               \
      if (full < L) {                                                                                     \
        for (int q = 0; q < cnt; q++)                                                                     \
          for (int k = 0; k < NV; k++) STOREU(lanes[q] + k * VW, acc[q][k]);                              \
        wgrad_cols(lanes, cnt, ui, v, o, full, L);                                                        \
        for (int q = 0; q < cnt; q++)                                                                     \
          for (int k = 0; k < NV; k++) acc[q][k] = LOADU(lanes[q] + k * VW);                              \
      }                                                                                                   \
    }                                                                                                     \
    for (int q = 0; q < cnt; q++)                                                                         \
      for (int k = 0; k < NV; k++) STOREU(lanes[q] + k * VW, acc[q][k]);                                  \
  }

#define AVX512_ATTR __attribute__((target("avx512f")))
#define AVX2_ATTR __attribute__((target("avx2,fma")))
#define MASK512(rem) ((__mmask16)((1u << (rem)) - 1u))
#define MLOAD512(p, mk) _mm512_maskz_loadu_ps((mk), (p))
#define MSTORE512(p, mk, v) _mm512_mask_storeu_ps((p), (mk), (v))
#define MASK256(rem) _mm256_cmpgt_epi32(_mm256_set1_epi32(rem), _mm256_setr_epi32(0, 1, 2, 3, 4, 5, 6, 7))
#define MLOAD256(p, mk) _mm256_maskload_ps((p), (mk))
#define MSTORE256(p, mk, v) _mm256_maskstore_ps((p), (mk), (v))
NM_GATHER(avx512, AVX512_ATTR, 2, __m512, 16, __mmask16, _mm512_loadu_ps, _mm512_storeu_ps, _mm512_set1_ps,
          _mm512_fmadd_ps, _mm512_setzero_ps, MASK512, MLOAD512, MSTORE512)
NM_GATHER(avx2, AVX2_ATTR, 1, __m256, 8, __m256i, _mm256_loadu_ps, _mm256_storeu_ps, _mm256_set1_ps,
          _mm256_fmadd_ps, _mm256_setzero_ps, MASK256, MLOAD256, MSTORE256)
NM_WGRAD(avx512, AVX512_ATTR, __m512, 16, _mm512_loadu_ps, _mm512_storeu_ps, _mm512_fmadd_ps)
NM_WGRAD(avx2, AVX2_ATTR, __m256, 8, _mm256_loadu_ps, _mm256_storeu_ps, _mm256_fmadd_ps)
#endif

static void gather_base(const int64_t *start, const int32_t *idx, int64_t r0, int64_t r1, const float *w,
                        int64_t wrow, int64_t wstep, const float *src, const int64_t *roff, int64_t lds,
                        float *out, int64_t ldo, int64_t L, int accumulate) {
  for (int64_t r = r0; r < r1; r++)
    gather_cols(start, idx, w + r * wrow, wstep, r, src, roff, lds, out + (r - r0) * ldo, 0, L, accumulate);
}

static void wgrad_lanes_base(float lanes[GROUP][LANES], int cnt, const float *u, int64_t us, const float *const *v,
                             int64_t vs, int64_t L, int64_t S) {
  for (int64_t i = 0; i < S; i++) wgrad_cols(lanes, cnt, u + i * us, v, i * vs, 0, L);
}

void rc__nm_gather(const int64_t *start, const int32_t *idx, int64_t r0, int64_t r1, const float *w, int64_t wrow,
                   int64_t wstep, const float *src, const int64_t *roff, int64_t lds, float *out, int64_t ldo,
                   int64_t L, int accumulate) {
#ifdef NM_X86
  const rc__isa level = rc__isa_level();
  if (level == RC_ISA_AVX512) {
    gather_avx512(start, idx, r0, r1, w, wrow, wstep, src, roff, lds, out, ldo, L, accumulate);
    return;
  }
  if (level == RC_ISA_AVX2) {
    gather_avx2(start, idx, r0, r1, w, wrow, wstep, src, roff, lds, out, ldo, L, accumulate);
    return;
  }
#endif
  gather_base(start, idx, r0, r1, w, wrow, wstep, src, roff, lds, out, ldo, L, accumulate);
}

typedef void (*wgrad_lanes_fn)(float lanes[GROUP][LANES], int cnt, const float *u, int64_t us,
                               const float *const *v, int64_t vs, int64_t L, int64_t S);

static wgrad_lanes_fn wgrad_lanes_for(rc__isa level) {
#ifdef NM_X86
  if (level == RC_ISA_AVX512) return wgrad_lanes_avx512;
  if (level == RC_ISA_AVX2) return wgrad_lanes_avx2;
#endif
  (void)level;
  return wgrad_lanes_base;
}

void rc__nm_wgrad(const rc__wpattern *p, int64_t r0, int64_t r1, float *dw, const float *u, int64_t ldu,
                  int64_t us, const float *v, int64_t ldv, int64_t vs, int64_t L, int64_t S) {
  const wgrad_lanes_fn lanes_of = wgrad_lanes_for(rc__isa_level());
  float lanes[GROUP][LANES];
  for (int64_t r = r0; r < r1; r++)
    for (int64_t e = p->start[r]; e < p->start[r + 1]; e += GROUP) {
      const int cnt = p->start[r + 1] - e < GROUP ? (int)(p->start[r + 1] - e) : GROUP;
      for (int q = 0; q < cnt; q++)
        for (int l = 0; l < LANES; l++) lanes[q][l] = 0.0f;
      const float *vq[GROUP];
      for (int q = 0; q < cnt; q++) vq[q] = v + p->col[e + q] * ldv;
      lanes_of(lanes, cnt, u + r * ldu, us, vq, vs, L, S);
      for (int q = 0; q < cnt; q++) dw[r * p->cols + p->col[e + q]] += lane_total(lanes[q]);
    }
}
