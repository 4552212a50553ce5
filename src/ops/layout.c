#include "ops/layout.h"

#include <string.h>

void rc__contig_strides(int64_t *stride, int rank, const int64_t *dims) {
  int64_t s = 1;
  for (int d = rank - 1; d >= 0; d--) {
    stride[d] = s;
    s *= dims[d];
  }
}

/* Drops size-1 axes and merges neighbours that are contiguous in the view, so
 * that the innermost loop is as long as possible. Returns the new rank, or -1
 * when the view is empty. */
static int simplify(int rank, const int64_t *dims, const int64_t *stride, int64_t *d, int64_t *s) {
  int r = 0;
  for (int i = 0; i < rank; i++) {
    if (dims[i] == 0) return -1;
    if (dims[i] == 1) continue;
    if (r > 0 && s[r - 1] == stride[i] * dims[i]) {
      d[r - 1] *= dims[i];
      s[r - 1] = stride[i];
      continue;
    }
    d[r] = dims[i];
    s[r] = stride[i];
    r++;
  }
  return r;
}

/* Advances the counters of axes 0..r-2 (the innermost axis is the caller's
 * loop) and returns the offset change. */
static int64_t step_outer(int r, const int64_t *d, const int64_t *s, int64_t *idx) {
  int64_t delta = 0;
  for (int k = r - 2; k >= 0; k--) {
    idx[k]++;
    delta += s[k];
    if (idx[k] < d[k]) break;
    delta -= s[k] * d[k];
    idx[k] = 0;
  }
  return delta;
}

/* Offset of outer row o (axes 0..r-2 of the view) and its counters. */
static int64_t row_start(int r, const int64_t *d, const int64_t *s, int64_t o, int64_t *idx) {
  int64_t off = 0;
  for (int k = r - 2; k >= 0; k--) {
    idx[k] = o % d[k];
    o /= d[k];
    off += idx[k] * s[k];
  }
  return off;
}

/* Row chunks for the threads: one unless the view is big enough to pay. */
#define PARALLEL_MIN 65536
static int chunk_count(int64_t n_outer, int64_t inner) {
  if (n_outer < 2 || n_outer * inner < PARALLEL_MIN) return 1;
  return n_outer < 64 ? (int)n_outer : 64;
}

#define COPY_ROW(T)                                                  \
  do {                                                               \
    T *o_ = (T *)dst + pos;                                          \
    const T *i_ = (const T *)src + off;                              \
    for (int64_t j = 0; j < inner; j++) o_[j] = i_[j * sin];         \
  } while (0)

/* Tiled 2-D transpose for views whose unit-stride axis k is not the
 * innermost one (NCHW <-> NHWC and the like): reads and writes stay within
 * a few cache lines per tile. */
#define TILE 16
#define TILE_COPY(T)                                                                       \
  do {                                                                                     \
    T *o_ = (T *)dst;                                                                      \
    const T *i_ = (const T *)src;                                                          \
    for (int64_t a0 = 0; a0 < na; a0 += TILE)                                              \
      for (int64_t b0 = 0; b0 < nb; b0 += TILE) {                                          \
        int64_t a1 = a0 + TILE < na ? a0 + TILE : na, b1 = b0 + TILE < nb ? b0 + TILE : nb; \
        for (int64_t a = a0; a < a1; a++)                                                  \
          for (int64_t b = b0; b < b1; b++) o_[dpos + a * dsa + b] = i_[soff + a + b * ssb]; \
      }                                                                                    \
  } while (0)

static int try_tiled(void *dst, const void *src, int64_t base, int r, const int64_t *d,
                     const int64_t *s, size_t esz) {
  if (r < 2 || s[r - 1] == 1 || (esz != 4 && esz != 8)) return 0;
  int k = -1;
  for (int i = 0; i < r - 1; i++)
    if (s[i] == 1) k = i;
  if (k < 0) return 0;
  int64_t ds[RC_VIEW_MAX_RANK];
  rc__contig_strides(ds, r, d);
  /* Outer axes: all but k and r-1. */
  int64_t od[RC_VIEW_MAX_RANK], os[RC_VIEW_MAX_RANK], odst[RC_VIEW_MAX_RANK], idx[RC_VIEW_MAX_RANK];
  int no = 0;
  int64_t n_outer = 1;
  for (int i = 0; i < r - 1; i++)
    if (i != k) {
      od[no] = d[i];
      os[no] = s[i];
      odst[no] = ds[i];
      idx[no] = 0;
      n_outer *= d[i];
      no++;
    }
  int64_t na = d[k], nb = d[r - 1], dsa = ds[k], ssb = s[r - 1];
  int64_t soff = base, dpos = 0;
  for (int64_t o = 0; o < n_outer; o++) {
    if (esz == 4)
      TILE_COPY(uint32_t);
    else
      TILE_COPY(uint64_t);
    for (int q = no - 1; q >= 0; q--) {
      idx[q]++;
      soff += os[q];
      dpos += odst[q];
      if (idx[q] < od[q]) break;
      soff -= os[q] * od[q];
      dpos -= odst[q] * od[q];
      idx[q] = 0;
    }
  }
  return 1;
}

void rc__view_copy(void *dst, const void *src, int64_t base, int rank, const int64_t *dims,
                   const int64_t *stride, size_t esz) {
  int64_t d[RC_VIEW_MAX_RANK], s[RC_VIEW_MAX_RANK];
  int r = simplify(rank, dims, stride, d, s);
  if (r < 0) return;
  if (r == 0) {
    memcpy(dst, (const char *)src + base * (int64_t)esz, esz);
    return;
  }
  if (try_tiled(dst, src, base, r, d, s, esz)) return;
  int64_t inner = d[r - 1], sin = s[r - 1], n_outer = 1;
  for (int k = 0; k < r - 1; k++) n_outer *= d[k];
  int chunks = chunk_count(n_outer, inner);
#pragma omp parallel for schedule(static) if (chunks > 1)
  for (int c = 0; c < chunks; c++) {
    int64_t o0 = n_outer * c / chunks, o1 = n_outer * (c + 1) / chunks, idx[RC_VIEW_MAX_RANK];
    int64_t off = base + row_start(r, d, s, o0, idx), pos = o0 * inner;
    for (int64_t o = o0; o < o1; o++, pos += inner) {
      if (sin == 1)
        memcpy((char *)dst + pos * (int64_t)esz, (const char *)src + off * (int64_t)esz, (size_t)inner * esz);
      else if (esz == 4)
        COPY_ROW(uint32_t);
      else if (esz == 8)
        COPY_ROW(uint64_t);
      else if (esz == 2)
        COPY_ROW(uint16_t);
      else
        COPY_ROW(uint8_t);
      off += step_outer(r, d, s, idx);
    }
  }
}

/* dst[i] += src[view(i)] (gather) or dst[view(i)] += src[i] (scatter), in
 * index order so that repeated view targets accumulate deterministically. */
static void view_accumulate(float *dst, const float *src, int64_t base, int rank, const int64_t *dims,
                            const int64_t *stride, int scatter) {
  int64_t d[RC_VIEW_MAX_RANK], s[RC_VIEW_MAX_RANK];
  int r = simplify(rank, dims, stride, d, s);
  if (r < 0) return;
  if (r == 0) {
    if (scatter)
      dst[base] += src[0];
    else
      dst[0] += src[base];
    return;
  }
  int64_t inner = d[r - 1], sv = s[r - 1], n_outer = 1;
  int one_to_one = 1; /* scatters race only where targets repeat (zero strides) */
  for (int k = 0; k < r; k++) {
    n_outer *= k < r - 1 ? d[k] : 1;
    one_to_one = one_to_one && s[k] != 0;
  }
  int chunks = scatter && !one_to_one ? 1 : chunk_count(n_outer, inner);
#pragma omp parallel for schedule(static) if (chunks > 1)
  for (int c = 0; c < chunks; c++) {
    int64_t o0 = n_outer * c / chunks, o1 = n_outer * (c + 1) / chunks, idx[RC_VIEW_MAX_RANK];
    int64_t off = base + row_start(r, d, s, o0, idx), pos = o0 * inner;
    for (int64_t o = o0; o < o1; o++, pos += inner) {
      float *op = scatter ? dst + off : dst + pos;
      const float *ip = scatter ? src + pos : src + off;
      if (sv == 1) {
        for (int64_t j = 0; j < inner; j++) op[j] += ip[j];
      } else if (!scatter) {
        for (int64_t j = 0; j < inner; j++) op[j] += ip[j * sv];
      } else if (sv == 0) {
        float acc = 0;
        for (int64_t j = 0; j < inner; j++) acc += ip[j];
        op[0] += acc;
      } else {
        for (int64_t j = 0; j < inner; j++) op[j * sv] += ip[j];
      }
      off += step_outer(r, d, s, idx);
    }
  }
}

void rc__view_gather_add(float *dst, const float *src, int64_t base, int rank, const int64_t *dims,
                         const int64_t *stride) {
  view_accumulate(dst, src, base, rank, dims, stride, 0);
}

void rc__view_scatter_add(float *dst, int64_t base, const float *src, int rank, const int64_t *dims,
                          const int64_t *stride) {
  view_accumulate(dst, src, base, rank, dims, stride, 1);
}

void rc__add_into(float *dst, const float *src, int64_t n) {
  for (int64_t i = 0; i < n; i++) dst[i] += src[i];
}

double rc__load_f64(const void *data, rc_dtype dt, int64_t i) {
  switch (dt) {
    case RC_DTYPE_FLOAT: return ((const float *)data)[i];
    case RC_DTYPE_DOUBLE: return ((const double *)data)[i];
    case RC_DTYPE_INT64: return (double)((const int64_t *)data)[i];
    case RC_DTYPE_INT32: return ((const int32_t *)data)[i];
    case RC_DTYPE_UINT32: return ((const uint32_t *)data)[i];
    case RC_DTYPE_INT16: return ((const int16_t *)data)[i];
    case RC_DTYPE_UINT16: return ((const uint16_t *)data)[i];
    case RC_DTYPE_INT8: case RC_DTYPE_INT4: return ((const int8_t *)data)[i];
    case RC_DTYPE_UINT8: case RC_DTYPE_UINT4: case RC_DTYPE_BOOL: return ((const uint8_t *)data)[i];
    case RC_DTYPE_UINT64: return (double)((const uint64_t *)data)[i];
    default: return 0;
  }
}

void rc__store_f64(void *data, rc_dtype dt, int64_t i, double v) {
  if (dt == RC_DTYPE_FLOAT) {
    ((float *)data)[i] = (float)v;
    return;
  }
  if (dt == RC_DTYPE_DOUBLE) {
    ((double *)data)[i] = v;
    return;
  }
  if (dt == RC_DTYPE_BOOL) {
    ((uint8_t *)data)[i] = v != 0;
    return;
  }
  int64_t q = (v != v) ? 0 : v >= 9.2e18 ? INT64_MAX : v <= -9.2e18 ? INT64_MIN : (int64_t)v;
  switch (dt) {
    case RC_DTYPE_INT64: ((int64_t *)data)[i] = q; break;
    case RC_DTYPE_UINT64: ((uint64_t *)data)[i] = (uint64_t)q; break;
    case RC_DTYPE_INT32: ((int32_t *)data)[i] = (int32_t)(uint32_t)q; break;
    case RC_DTYPE_UINT32: ((uint32_t *)data)[i] = (uint32_t)q; break;
    case RC_DTYPE_INT16: ((int16_t *)data)[i] = (int16_t)(uint16_t)q; break;
    case RC_DTYPE_UINT16: ((uint16_t *)data)[i] = (uint16_t)q; break;
    case RC_DTYPE_INT8: case RC_DTYPE_INT4: ((int8_t *)data)[i] = (int8_t)(uint8_t)q; break;
    case RC_DTYPE_UINT8: case RC_DTYPE_UINT4: ((uint8_t *)data)[i] = (uint8_t)q; break;
    default: break;
  }
}
