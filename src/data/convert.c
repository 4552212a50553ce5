/* Arrays into model inputs: dtype conversion with normalisation, sample
 * reshaping to the model's input, and label checks. */
#include <errno.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "core/alloc.h"
#include "data/data_internal.h"
#include "recoup/image.h"

void rc_data_norm_identity(rc_data_norm *n) {
  memset(n, 0, sizeof *n);
  n->scale = 1.0f;
}

rc_status rc_data_parse_floats(const char *s, float *out, int max, int *n, rc_err *e) {
  *n = 0;
  if (!s) return rc__fail(e, RC_ERR_INVALID, "no number list given");
  const char *p = s;
  for (;;) {
    while (*p == ' ' || *p == '\t') p++;
    if (*p == '\0' || *p == ',')
      return rc__fail(e, RC_ERR_INVALID, "'%s': empty item %d in the number list", s, *n + 1);
    char *end;
    errno = 0;
    double v = strtod(p, &end);
    if (end == p) return rc__fail(e, RC_ERR_INVALID, "'%s': item %d is not a number", s, *n + 1);
    if (!isfinite(v) || fabs(v) > 3.4028234663852886e38)
      return rc__fail(e, RC_ERR_INVALID, "'%s': item %d is not a finite float32 value", s, *n + 1);
    if (*n >= max) return rc__fail(e, RC_ERR_INVALID, "'%s': more than %d values", s, max);
    out[(*n)++] = (float)v;
    p = end;
    while (*p == ' ' || *p == '\t') p++;
    if (*p == '\0') return RC_OK;
    if (*p != ',') return rc__fail(e, RC_ERR_INVALID, "'%s': unexpected '%c' after item %d", s, *p, *n);
    p++;
  }
}

static float half_to_float(uint16_t h) {
  uint32_t sign = (uint32_t)(h >> 15) << 31, ex = (h >> 10) & 0x1f, man = h & 0x3ff;
  uint32_t bits;
  if (ex == 0x1f) {
    bits = sign | 0x7f800000u | (man << 13);
  } else if (ex == 0) {
    /* Subnormal half: value man * 2^-24, exact in float. */
    float f = (float)man * (1.0f / 16777216.0f);
    return sign ? -f : f;
  } else {
    bits = sign | ((ex + 112) << 23) | (man << 13);
  }
  float f;
  memcpy(&f, &bits, 4);
  return f;
}

static float bf16_to_float(uint16_t h) {
  uint32_t bits = (uint32_t)h << 16;
  float f;
  memcpy(&f, &bits, 4);
  return f;
}

static int numeric(rc_dtype t) {
  return rc_dtype_is_integer(t) || rc_dtype_is_float(t) || t == RC_DTYPE_BOOL;
}

/* out[i] = (float)in[first + i] for count elements. */
static void cast_to_float(float *out, const void *data, rc_dtype t, size_t first, size_t count) {
#define CAST_LOOP(T)                                                 \
  do {                                                               \
    const T *src_ = (const T *)data + first;                         \
    for (size_t i_ = 0; i_ < count; i_++) out[i_] = (float)src_[i_]; \
  } while (0)
  switch (t) {
    case RC_DTYPE_FLOAT: memcpy(out, (const float *)data + first, count * sizeof(float)); break;
    case RC_DTYPE_DOUBLE: CAST_LOOP(double); break;
    case RC_DTYPE_UINT8: case RC_DTYPE_UINT4: CAST_LOOP(uint8_t); break;
    case RC_DTYPE_INT8: case RC_DTYPE_INT4: CAST_LOOP(int8_t); break;
    case RC_DTYPE_UINT16: CAST_LOOP(uint16_t); break;
    case RC_DTYPE_INT16: CAST_LOOP(int16_t); break;
    case RC_DTYPE_UINT32: CAST_LOOP(uint32_t); break;
    case RC_DTYPE_INT32: CAST_LOOP(int32_t); break;
    case RC_DTYPE_UINT64: CAST_LOOP(uint64_t); break;
    case RC_DTYPE_INT64: CAST_LOOP(int64_t); break;
    case RC_DTYPE_BOOL: {
      const uint8_t *src = (const uint8_t *)data + first;
      for (size_t i = 0; i < count; i++) out[i] = src[i] ? 1.0f : 0.0f;
      break;
    }
    case RC_DTYPE_FLOAT16: {
      const uint16_t *src = (const uint16_t *)data + first;
      for (size_t i = 0; i < count; i++) out[i] = half_to_float(src[i]);
      break;
    }
    case RC_DTYPE_BFLOAT16: {
      const uint16_t *src = (const uint16_t *)data + first;
      for (size_t i = 0; i < count; i++) out[i] = bf16_to_float(src[i]);
      break;
    }
    default: break;
  }
#undef CAST_LOOP
}

/* Channel count the normalisation needs (1 = scalar), validated against a. */
static rc_status norm_channels(int64_t *channels, const rc_tensor *t, const rc_data_norm *nm, rc_err *e) {
  if (!isfinite(nm->scale)) return rc__fail(e, RC_ERR_INVALID, "normalisation scale is not finite");
  int c = 1;
  if (nm->n_mean > 1) c = nm->n_mean;
  if (nm->n_std > 1) {
    if (c > 1 && nm->n_std != c)
      return rc__fail(e, RC_ERR_INVALID, "%d mean values but %d std values", c, nm->n_std);
    c = nm->n_std;
  }
  for (int i = 0; i < nm->n_mean; i++)
    if (!isfinite(nm->mean[i])) return rc__fail(e, RC_ERR_INVALID, "mean[%d] is not finite", i);
  for (int i = 0; i < nm->n_std; i++)
    if (!isfinite(nm->std[i]) || nm->std[i] == 0.0f)
      return rc__fail(e, RC_ERR_INVALID, "std[%d] is %g; it must be finite and non-zero", i, (double)nm->std[i]);
  if (c > 1) {
    char shape[128];
    if (t->rank < 2 || t->dims[1] != c)
      return rc__fail(e, RC_ERR_SHAPE, "%d per-channel values do not match data of shape %s (channels on axis 1)",
                      c, rc_shape_str(t, shape, sizeof shape));
  }
  *channels = c;
  return RC_OK;
}

/* Samples of an image stream, decoded one at a time through a buffer of one
 * image, then cast as any uint8 source. */
static rc_status decode_to_float(float *out, const rc_array *in, int64_t first, int64_t count, size_t per,
                                 rc_err *e) {
  if (in->t.dtype != RC_DTYPE_UINT8) return rc__fail(e, RC_ERR_INVALID, "an image stream holds uint8 samples");
  uint8_t *px = rc__malloc(per);
  if (!px) return rc__fail(e, RC_ERR_NOMEM, "out of memory for one image of %zu bytes", per);
  rc_status s = RC_OK;
  for (int64_t k = 0; k < count && s == RC_OK; k++) {
    s = rc_image_stream_read(in->stream, px, first + k, e);
    if (s == RC_OK) cast_to_float(out + (size_t)k * per, px, RC_DTYPE_UINT8, 0, per);
  }
  rc__free(px);
  return s;
}

rc_status rc_data_to_float(float *out, const rc_array *in, int64_t first, int64_t count,
                           const rc_data_norm *norm, rc_err *e) {
  const rc_tensor *t = &in->t;
  if (!numeric(t->dtype))
    return rc__fail(e, RC_ERR_UNSUPPORTED, "cannot convert %s data to float32", rc_dtype_name(t->dtype));
  if (t->rank < 1) return rc__fail(e, RC_ERR_SHAPE, "data has no sample axis (rank 0)");
  if (first < 0 || count < 0 || first > t->dims[0] || count > t->dims[0] - first)
    return rc__fail(e, RC_ERR_INVALID, "samples %lld..%lld are outside 0..%lld", (long long)first,
                    (long long)(first + count - 1), (long long)t->dims[0] - 1);
  rc_data_norm ident;
  if (!norm) {
    rc_data_norm_identity(&ident);
    norm = &ident;
  }
  int64_t channels;
  RC_TRY(norm_channels(&channels, t, norm, e));
  size_t per = 1;
  for (int i = 1; i < t->rank; i++) per *= (size_t)t->dims[i]; /* bounded: the data exists */
  /* Empty samples: nothing to convert, however many a header declares. */
  if (per == 0) return RC_OK;
  size_t inner = per / (size_t)channels;
  size_t total = per * (size_t)count;
  if (in->stream)
    RC_TRY(decode_to_float(out, in, first, count, per, e));
  else
    cast_to_float(out, t->data, t->dtype, per * (size_t)first, total);
  const float scale = norm->scale;
  for (int64_t s = 0; s < count; s++) {
    float *x = out + (size_t)s * per;
    for (int64_t c = 0; c < channels; c++) {
      float m = norm->n_mean == 0 ? 0.0f : norm->mean[norm->n_mean > 1 ? c : 0];
      float d = norm->n_std == 0 ? 1.0f : norm->std[norm->n_std > 1 ? c : 0];
      float *xc = x + (size_t)c * inner;
      for (size_t i = 0; i < inner; i++) xc[i] = (xc[i] * scale - m) / d;
    }
    for (size_t i = 0; i < per; i++)
      if (!isfinite(x[i]))
        return rc__fail(e, RC_ERR_NUMERIC, "sample %lld, element %zu: %s", (long long)(first + s), i,
                        isnan(x[i]) ? "NaN" : x[i] > 0 ? "+inf" : "-inf");
  }
  return RC_OK;
}

rc_status rc_data_to_float_array(rc_array *out, const rc_array *in, const rc_data_norm *norm, rc_err *e) {
  memset(out, 0, sizeof *out);
  if (in->t.rank < 1) return rc__fail(e, RC_ERR_SHAPE, "data has no sample axis (rank 0)");
  rc_tensor ft = in->t;
  ft.dtype = RC_DTYPE_FLOAT;
  ft.data = NULL;
  size_t bytes = rc_tensor_nbytes(&ft);
  if (bytes == SIZE_MAX) return rc__fail(e, RC_ERR_LIMIT, "float32 copy of the data overflows the address space");
  float *buf = rc__malloc(bytes);
  if (!buf) return rc__fail(e, RC_ERR_NOMEM, "out of memory for %zu bytes of float32 data", bytes);
  rc_status st = rc_data_to_float(buf, in, 0, in->t.dims[0], norm, e);
  if (st != RC_OK) {
    rc__free(buf);
    return st;
  }
  out->t = ft;
  out->t.data = buf;
  out->owned = buf;
  return RC_OK;
}

/* Dims other than 1, in order. */
static int squeeze(int64_t *out, const int64_t *dims, int rank) {
  int k = 0;
  for (int i = 0; i < rank; i++)
    if (dims[i] != 1) out[k++] = dims[i];
  return k;
}

rc_status rc_data_fit(rc_array *a, const rc_tensor *sample_shape, rc_err *e) {
  char have[160], want[160];
  rc_tensor sample = {a->t.dtype, a->t.rank - 1, {0}, NULL};
  if (a->t.rank < 1) return rc__fail(e, RC_ERR_SHAPE, "data has no sample axis (rank 0)");
  memcpy(sample.dims, a->t.dims + 1, sizeof(int64_t) * (size_t)sample.rank);
  rc_shape_str(&sample, have, sizeof have);
  rc_shape_str(sample_shape, want, sizeof want);
  for (int i = 0; i < sample_shape->rank; i++)
    if (sample_shape->dims[i] <= 0)
      return rc__fail(e, RC_ERR_INVALID, "model input shape %s (batch axis excluded) has an unknown dimension", want);
  if (rc_shape_equal(&sample, sample_shape)) return RC_OK;
  int64_t sa[RC_MAX_RANK], sb[RC_MAX_RANK];
  int ka = squeeze(sa, sample.dims, sample.rank), kb = squeeze(sb, sample_shape->dims, sample_shape->rank);
  int same = ka == kb && !memcmp(sa, sb, sizeof(int64_t) * (size_t)ka);
  if (!same || sample_shape->rank + 1 > RC_MAX_RANK)
    return rc__fail(e, RC_ERR_SHAPE, "data samples of shape %s do not fit the model input %s (batch axis excluded)",
                    have, want);
  /* Same non-1 dims in the same order means the same element count and the
   * same memory layout: only the dims change. */
  a->t.rank = sample_shape->rank + 1;
  memcpy(a->t.dims + 1, sample_shape->dims, sizeof(int64_t) * (size_t)sample_shape->rank);
  return RC_OK;
}

/* Label i as an integer; 0 if it is not a whole number (*whole = 0). */
static int64_t label_at(const rc_tensor *t, size_t i, int *whole, double *raw) {
  *whole = 1;
  double v;
  switch (t->dtype) {
    case RC_DTYPE_UINT8: case RC_DTYPE_UINT4: case RC_DTYPE_BOOL: return ((const uint8_t *)t->data)[i];
    case RC_DTYPE_INT8: case RC_DTYPE_INT4: return ((const int8_t *)t->data)[i];
    case RC_DTYPE_UINT16: return ((const uint16_t *)t->data)[i];
    case RC_DTYPE_INT16: return ((const int16_t *)t->data)[i];
    case RC_DTYPE_UINT32: return ((const uint32_t *)t->data)[i];
    case RC_DTYPE_INT32: return ((const int32_t *)t->data)[i];
    case RC_DTYPE_INT64: return ((const int64_t *)t->data)[i];
    case RC_DTYPE_UINT64: {
      uint64_t u = ((const uint64_t *)t->data)[i];
      return u > (uint64_t)INT64_MAX ? INT64_MAX : (int64_t)u;
    }
    case RC_DTYPE_FLOAT: v = ((const float *)t->data)[i]; break;
    case RC_DTYPE_DOUBLE: v = ((const double *)t->data)[i]; break;
    case RC_DTYPE_FLOAT16: v = half_to_float(((const uint16_t *)t->data)[i]); break;
    case RC_DTYPE_BFLOAT16: v = bf16_to_float(((const uint16_t *)t->data)[i]); break;
    default: *whole = 0; *raw = 0; return 0;
  }
  *raw = v;
  if (!isfinite(v) || v != floor(v) || fabs(v) > 9.0e15) {
    *whole = 0;
    return 0;
  }
  return (int64_t)v;
}

rc_status rc_labels_check(const rc_array *labels, int64_t n_samples, int64_t n_classes, rc_err *e) {
  const rc_tensor *t = &labels->t;
  char shape[128];
  rc_shape_str(t, shape, sizeof shape);
  if (!numeric(t->dtype))
    return rc__fail(e, RC_ERR_UNSUPPORTED, "labels of type %s; integer (or whole-number float) labels are needed",
                    rc_dtype_name(t->dtype));
  if (!(t->rank == 1 || (t->rank == 2 && t->dims[1] == 1)))
    return rc__fail(e, RC_ERR_SHAPE, "labels have shape %s; (N) or (N, 1) is needed", shape);
  if (t->dims[0] != n_samples)
    return rc__fail(e, RC_ERR_SHAPE, "%lld labels for %lld samples", (long long)t->dims[0], (long long)n_samples);
  if (n_classes < 1 || n_classes > INT32_MAX)
    return rc__fail(e, RC_ERR_INVALID, "class count %lld is out of range", (long long)n_classes);
  for (int64_t i = 0; i < n_samples; i++) {
    int whole;
    double raw;
    int64_t v = label_at(t, (size_t)i, &whole, &raw);
    if (!whole)
      return rc__fail(e, RC_ERR_INVALID, "label at position %lld is %g, not a whole number", (long long)i, raw);
    if (v < 0 || v >= n_classes)
      return rc__fail(e, RC_ERR_INVALID, "label at position %lld is %lld, outside 0..%lld for %lld classes",
                      (long long)i, (long long)v, (long long)n_classes - 1, (long long)n_classes);
  }
  return RC_OK;
}

rc_status rc_labels_to_int32(rc_array *out, const rc_array *labels, int64_t n_samples, int64_t n_classes,
                             rc_err *e) {
  memset(out, 0, sizeof *out);
  RC_TRY(rc_labels_check(labels, n_samples, n_classes, e));
  size_t bytes;
  if (!rc__mul_size((size_t)n_samples, sizeof(int32_t), &bytes))
    return rc__fail(e, RC_ERR_LIMIT, "label count %lld overflows", (long long)n_samples);
  int32_t *buf = rc__malloc(bytes);
  if (!buf) return rc__fail(e, RC_ERR_NOMEM, "out of memory for %lld labels", (long long)n_samples);
  for (int64_t i = 0; i < n_samples; i++) {
    int whole;
    double raw;
    buf[i] = (int32_t)label_at(&labels->t, (size_t)i, &whole, &raw);
  }
  out->t.dtype = RC_DTYPE_INT32;
  out->t.rank = 1;
  out->t.dims[0] = n_samples;
  out->t.data = buf;
  out->owned = buf;
  return RC_OK;
}
