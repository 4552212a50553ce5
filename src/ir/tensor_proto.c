/* TensorProto <-> native tensors. One decoder serves initializers, attribute
 * tensors and *.pb test data files; one encoder writes changed initializers.
 * Field usage follows onnx.proto: raw_data little-endian; float_data;
 * int32_data for int8/uint8/int16/uint16/bool/float16/bfloat16 (one element
 * per entry) and int4/uint4 (one packed byte per entry); int64_data;
 * double_data; uint64_data for uint32/uint64. */
#define _POSIX_C_SOURCE 200809L
#define _DEFAULT_SOURCE

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "core/alloc.h"
#include "ir/tensor_proto.h"

/* ---- half precision ---- */

uint16_t rc__float_to_half(float f) {
  uint32_t x;
  memcpy(&x, &f, 4);
  uint32_t sign = (x >> 16) & 0x8000u;
  uint32_t exp = (x >> 23) & 0xffu, man = x & 0x7fffffu;
  if (exp == 0xff) return (uint16_t)(sign | 0x7c00u | (man ? 0x200u : 0)); /* inf / nan */
  int e = (int)exp - 127 + 15;
  if (e >= 31) return (uint16_t)(sign | 0x7c00u);                         /* overflow */
  if (e <= 0) {                                                            /* subnormal or zero */
    if (e < -10) return (uint16_t)sign;
    man |= 0x800000u;
    int shift = 14 - e;
    uint32_t h = man >> shift, rem = man & ((1u << shift) - 1), half = 1u << (shift - 1);
    if (rem > half || (rem == half && (h & 1))) h++;
    return (uint16_t)(sign | h);
  }
  uint32_t h = ((uint32_t)e << 10) | (man >> 13), rem = man & 0x1fffu;
  if (rem > 0x1000u || (rem == 0x1000u && (h & 1))) h++; /* carry into exponent is correct */
  return (uint16_t)(sign | h);
}

float rc__half_to_float(uint16_t h) {
  uint32_t sign = (uint32_t)(h & 0x8000u) << 16, exp = (h >> 10) & 0x1fu, man = h & 0x3ffu, x;
  if (exp == 0) {
    if (!man) {
      x = sign;
    } else { /* subnormal: normalise */
      int e = -1;
      do {
        man <<= 1;
        e++;
      } while (!(man & 0x400u));
      x = sign | ((uint32_t)(127 - 15 - e) << 23) | ((man & 0x3ffu) << 13);
    }
  } else if (exp == 31) {
    x = sign | 0x7f800000u | (man << 13);
  } else {
    x = sign | ((exp - 15 + 127) << 23) | (man << 13);
  }
  float f;
  memcpy(&f, &x, 4);
  return f;
}

uint16_t rc__float_to_bfloat16(float f) {
  uint32_t x;
  memcpy(&x, &f, 4);
  if ((x & 0x7f800000u) == 0x7f800000u && (x & 0x7fffffu)) return (uint16_t)((x >> 16) | 0x40u);
  x += 0x7fffu + ((x >> 16) & 1u); /* round to nearest even */
  return (uint16_t)(x >> 16);
}

/* ---- decoding ---- */

static int is_sub_byte(rc_dtype dt) { return dt == RC_DTYPE_INT4 || dt == RC_DTYPE_UINT4; }

size_t rc__raw_bytes(rc_dtype dt, int64_t numel, int *ok) {
  size_t es = rc_dtype_size(dt), n;
  *ok = 0;
  if (!es || numel < 0) return 0;
  if (is_sub_byte(dt)) {
    *ok = 1;
    return (size_t)((uint64_t)numel / 2 + ((uint64_t)numel & 1));
  }
  if (!rc__mul_size((size_t)numel, es, &n)) return 0;
  *ok = 1;
  return n;
}

int rc__onnx_dtype_supported(int32_t dt) {
  switch (dt) {
    case RC_DTYPE_FLOAT: case RC_DTYPE_UINT8: case RC_DTYPE_INT8: case RC_DTYPE_UINT16:
    case RC_DTYPE_INT16: case RC_DTYPE_INT32: case RC_DTYPE_INT64: case RC_DTYPE_BOOL:
    case RC_DTYPE_FLOAT16: case RC_DTYPE_DOUBLE: case RC_DTYPE_UINT32: case RC_DTYPE_UINT64:
    case RC_DTYPE_BFLOAT16: case RC_DTYPE_UINT4: case RC_DTYPE_INT4: return 1;
    default: return 0;
  }
}

const char *rc__onnx_dtype_label(int32_t dt) {
  switch (dt) {
    case 0: return "undefined";
    case 8: return "string";
    case 14: return "complex64";
    case 15: return "complex128";
    case 17: case 18: case 19: case 20: return "float8";
    default: return rc__onnx_dtype_supported(dt) ? rc_dtype_name((rc_dtype)dt) : "unknown";
  }
}

/* Walks backwards so that out may be packed itself: element i reads byte
 * i/2 <= i, which no later step has overwritten yet. */
static void unpack_4bit(uint8_t *out, const uint8_t *packed, int64_t numel, int is_signed) {
  for (int64_t i = numel; i-- > 0;) {
    uint8_t nib = (uint8_t)((packed[i / 2] >> ((i & 1) * 4)) & 0x0f);
    out[i] = is_signed ? (uint8_t)(int8_t)((int8_t)(nib << 4) >> 4) : nib;
  }
}

/* Range of int32_data entries for a dtype stored there. */
static void int32_field_range(rc_dtype dt, int64_t *lo, int64_t *hi) {
  switch (dt) {
    case RC_DTYPE_INT8: *lo = -128; *hi = 127; break;
    case RC_DTYPE_UINT8: case RC_DTYPE_INT4: case RC_DTYPE_UINT4: *lo = 0; *hi = 255; break;
    case RC_DTYPE_INT16: *lo = -32768; *hi = 32767; break;
    case RC_DTYPE_UINT16: case RC_DTYPE_FLOAT16: case RC_DTYPE_BFLOAT16: *lo = 0; *hi = 65535; break;
    case RC_DTYPE_BOOL: *lo = 0; *hi = 1; break;
    default: *lo = INT32_MIN; *hi = INT32_MAX; break;
  }
}

/* Decode typed (non-raw) fields into dst. */
static rc_status decode_typed(const Onnx__TensorProto *t, const char *what, const char *file,
                              rc_dtype dt, int64_t numel, uint8_t *dst, size_t raw_n, rc_err *e) {
  size_t have, used_field = 0;
  const char *field;
  switch (dt) {
    case RC_DTYPE_FLOAT: have = t->n_float_data; field = "float_data"; break;
    case RC_DTYPE_DOUBLE: have = t->n_double_data; field = "double_data"; break;
    case RC_DTYPE_INT64: have = t->n_int64_data; field = "int64_data"; break;
    case RC_DTYPE_UINT32: case RC_DTYPE_UINT64: have = t->n_uint64_data; field = "uint64_data"; break;
    default: have = t->n_int32_data; field = "int32_data"; break;
  }
  size_t all = t->n_float_data + t->n_double_data + t->n_int64_data + t->n_uint64_data +
               t->n_int32_data + t->n_string_data;
  used_field = have;
  if (all != used_field)
    return rc__fail(e, RC_ERR_FORMAT, "%s: %s: data is stored in a field that does not match its "
                    "dtype %s (expected %s)", file, what, rc_dtype_name(dt), field);
  size_t want = is_sub_byte(dt) ? raw_n : (size_t)numel;
  if (have != want)
    return rc__fail(e, RC_ERR_FORMAT, "%s: %s: %s holds %zu values but the shape needs %zu", file,
                    what, field, have, want);
  switch (dt) {
    case RC_DTYPE_FLOAT: memcpy(dst, t->float_data, have * 4); return RC_OK;
    case RC_DTYPE_DOUBLE: memcpy(dst, t->double_data, have * 8); return RC_OK;
    case RC_DTYPE_INT64: memcpy(dst, t->int64_data, have * 8); return RC_OK;
    case RC_DTYPE_UINT64: memcpy(dst, t->uint64_data, have * 8); return RC_OK;
    case RC_DTYPE_UINT32:
      for (size_t i = 0; i < have; i++) {
        if (t->uint64_data[i] > UINT32_MAX)
          return rc__fail(e, RC_ERR_FORMAT, "%s: %s: value %llu at %zu does not fit uint32", file,
                          what, (unsigned long long)t->uint64_data[i], i);
        uint32_t v = (uint32_t)t->uint64_data[i];
        memcpy(dst + 4 * i, &v, 4);
      }
      return RC_OK;
    default: break;
  }
  int64_t lo, hi;
  int32_field_range(dt, &lo, &hi);
  for (size_t i = 0; i < have; i++)
    if (t->int32_data[i] < lo || t->int32_data[i] > hi)
      return rc__fail(e, RC_ERR_FORMAT, "%s: %s: int32_data value %d at %zu is out of range for %s",
                      file, what, (int)t->int32_data[i], i, rc_dtype_name(dt));
  if (is_sub_byte(dt)) {
    for (size_t i = 0; i < have; i++) dst[i] = (uint8_t)t->int32_data[i];
    unpack_4bit(dst, dst, numel, dt == RC_DTYPE_INT4);
    return RC_OK;
  }
  size_t es = rc_dtype_size(dt);
  for (size_t i = 0; i < have; i++) {
    int32_t v = t->int32_data[i];
    if (es == 4) {
      memcpy(dst + 4 * i, &v, 4);
    } else if (es == 2) {
      uint16_t u = (uint16_t)v;
      memcpy(dst + 2 * i, &u, 2);
    } else {
      dst[i] = (uint8_t)v;
    }
  }
  return RC_OK;
}

rc_status rc__tensor_decode(const Onnx__TensorProto *t, const char *what, const rc__decode_ctx *ctx,
                            rc_tensor *out, rc_err *e) {
  const char *file = ctx->file;
  memset(out, 0, sizeof *out);
  int32_t dt = t->has_data_type ? t->data_type : 0;
  if (!rc__onnx_dtype_supported(dt))
    return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: %s: data type %d (%s) is not supported", file, what,
                    (int)dt, rc__onnx_dtype_label(dt));
  int max_rank = ctx->max_rank > 0 && ctx->max_rank < RC_MAX_RANK ? ctx->max_rank : RC_MAX_RANK;
  if (t->n_dims > (size_t)max_rank)
    return rc__fail(e, RC_ERR_LIMIT, "%s: %s: rank %zu is over the limit of %d", file, what,
                    t->n_dims, max_rank);
  if (t->segment)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: %s: segmented tensors are not supported", file, what);
  int64_t numel = 1;
  for (size_t i = 0; i < t->n_dims; i++) {
    int64_t d = t->dims[i];
    if (d < 0)
      return rc__fail(e, RC_ERR_FORMAT, "%s: %s: dimension %zu is negative (%lld)", file, what, i,
                      (long long)d);
    if (d != 0 && numel > INT64_MAX / d)
      return rc__fail(e, RC_ERR_LIMIT, "%s: %s: element count overflows", file, what);
    numel *= d;
    out->dims[i] = d;
  }
  out->rank = (int)t->n_dims;
  out->dtype = (rc_dtype)dt;
  int ok;
  size_t mem_n = 0, raw_n = rc__raw_bytes(out->dtype, numel, &ok);
  if (ok) ok = rc__mul_size((size_t)numel, rc_dtype_size(out->dtype), &mem_n);
  if (!ok || mem_n > ctx->max_tensor_bytes)
    return rc__fail(e, RC_ERR_LIMIT, "%s: %s: %lld elements of %s are over the tensor limit of %zu "
                    "bytes", file, what, (long long)numel, rc_dtype_name(out->dtype),
                    ctx->max_tensor_bytes);
  if (ctx->total_bytes) {
    if (mem_n > ctx->max_total_bytes - (*ctx->total_bytes < ctx->max_total_bytes
                                            ? *ctx->total_bytes : ctx->max_total_bytes))
      return rc__fail(e, RC_ERR_LIMIT, "%s: %s: tensors together exceed the limit of %zu bytes",
                      file, what, ctx->max_total_bytes);
    *ctx->total_bytes += mem_n;
  }
  int external = t->has_data_location &&
                 t->data_location == ONNX__TENSOR_PROTO__DATA_LOCATION__EXTERNAL;
  size_t n_typed = t->n_float_data + t->n_double_data + t->n_int64_data + t->n_uint64_data +
                   t->n_int32_data + t->n_string_data;
  if ((external && (t->has_raw_data || n_typed)) || (t->has_raw_data && n_typed))
    return rc__fail(e, RC_ERR_FORMAT, "%s: %s: data is given in more than one form", file, what);
  uint8_t *dst = ctx->alloc(ctx->alloc_data, mem_n);
  if (!dst)
    return rc__fail(e, RC_ERR_NOMEM, "%s: %s: out of memory for %zu bytes", file, what, mem_n);
  out->data = dst;
  const uint8_t *raw = NULL;
  uint8_t *ext = NULL;
  if (external) {
    if (!ctx->dir)
      return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: %s: external data is not allowed here", file, what);
    rc__external_ref ref;
    rc_status st = rc__external_parse(t, what, &ref, e);
    if (st == RC_OK) st = rc__external_read(ctx->dir, what, &ref, raw_n, &ext, e);
    if (st != RC_OK) return rc__wrap(e, "%s", file);
    raw = ext;
  } else if (t->has_raw_data) {
    if (t->raw_data.len != raw_n)
      return rc__fail(e, RC_ERR_FORMAT, "%s: %s: raw_data has %zu bytes but the shape needs %zu",
                      file, what, t->raw_data.len, raw_n);
    raw = t->raw_data.data;
  } else {
    if (numel == 0 && n_typed == 0) return RC_OK;
    if (n_typed == 0)
      return rc__fail(e, RC_ERR_FORMAT, "%s: %s: no data for %lld elements", file, what,
                      (long long)numel);
    return decode_typed(t, what, file, out->dtype, numel, dst, raw_n, e);
  }
  if (is_sub_byte(out->dtype)) {
    unpack_4bit(dst, raw, numel, out->dtype == RC_DTYPE_INT4);
  } else if (out->dtype == RC_DTYPE_BOOL) {
    for (size_t i = 0; i < raw_n; i++) dst[i] = raw[i] != 0;
  } else if (raw_n) {
    memcpy(dst, raw, raw_n);
  }
  rc__free(ext);
  return RC_OK;
}

/* ---- encoding ---- */

static rc_status encode_fail(rc_err *e, const char *what, const char *why, int64_t i, double v) {
  return rc__fail(e, RC_ERR_NUMERIC, "%s: value %g at element %lld %s", what, v, (long long)i, why);
}

/* One float32 element to an integer of [lo, hi]: must be integral. */
static rc_status float_to_int(float f, double lo, double hi, const char *what, int64_t i,
                              int64_t *out, rc_err *e) {
  if (isnan(f)) return encode_fail(e, what, "is NaN", i, f);
  if (f != nearbyintf(f) || f < lo || f > hi)
    return encode_fail(e, what, "is not an integer in the file's integer range", i, f);
  *out = (int64_t)f;
  return RC_OK;
}

static rc_status store_int(uint8_t *dst, rc_dtype dt, int64_t i, int64_t v) {
  switch (rc_dtype_size(dt)) {
    case 1: dst[i] = (uint8_t)v; break;
    case 2: { uint16_t u = (uint16_t)v; memcpy(dst + 2 * i, &u, 2); break; }
    case 4: { uint32_t u = (uint32_t)v; memcpy(dst + 4 * i, &u, 4); break; }
    default: { uint64_t u = (uint64_t)v; memcpy(dst + 8 * i, &u, 8); break; }
  }
  return RC_OK;
}

static void int_range(rc_dtype dt, double *lo, double *hi) {
  switch (dt) {
    case RC_DTYPE_INT4: *lo = -8; *hi = 7; break;
    case RC_DTYPE_UINT4: *lo = 0; *hi = 15; break;
    case RC_DTYPE_INT8: *lo = -128; *hi = 127; break;
    case RC_DTYPE_UINT8: *lo = 0; *hi = 255; break;
    case RC_DTYPE_INT16: *lo = -32768; *hi = 32767; break;
    case RC_DTYPE_UINT16: *lo = 0; *hi = 65535; break;
    case RC_DTYPE_INT32: *lo = -2147483648.0; *hi = 2147483647.0; break;
    case RC_DTYPE_UINT32: *lo = 0; *hi = 4294967295.0; break;
    case RC_DTYPE_BOOL: *lo = 0; *hi = 1; break;
    /* float32 holds integers exactly only up to 2^24 anyway; the bounds keep
     * the cast defined. */
    case RC_DTYPE_INT64: *lo = -9223372036854775808.0; *hi = 9223372036854774784.0; break;
    default: *lo = 0; *hi = 18446744073709549568.0; break;
  }
}

/* Elements as unpacked bytes (int4/uint4) checked for range. */
static rc_status check_4bit(const uint8_t *v, int64_t n, rc_dtype dt, const char *what, rc_err *e) {
  for (int64_t i = 0; i < n; i++) {
    int x = dt == RC_DTYPE_INT4 ? (int)(int8_t)v[i] : (int)v[i];
    if (dt == RC_DTYPE_INT4 ? (x < -8 || x > 7) : x > 15)
      return encode_fail(e, what, "does not fit 4 bits", i, x);
  }
  return RC_OK;
}

rc_status rc__tensor_encode_raw(const rc_tensor *t, rc_dtype fdt, const char *what, uint8_t **raw,
                                size_t *n_out, rc_err *e) {
  *raw = NULL;
  *n_out = 0;
  if (!t->data && rc_tensor_numel(t) != 0)
    return rc__fail(e, RC_ERR_INVALID, "%s: has no data to write", what);
  int64_t numel = rc_tensor_numel(t);
  int ok;
  size_t n = rc__raw_bytes(fdt, numel, &ok);
  if (!ok) return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: cannot write dtype %s", what, rc_dtype_name(fdt));
  int convert = t->dtype != fdt;
  if (convert && t->dtype != RC_DTYPE_FLOAT)
    return rc__fail(e, RC_ERR_INVALID, "%s: data is %s but the file stores %s", what,
                    rc_dtype_name(t->dtype), rc_dtype_name(fdt));
  uint8_t *unpacked = NULL; /* int4/uint4: one byte per element before packing */
  uint8_t *dst = rc__calloc(n ? n : 1, 1);
  if (is_sub_byte(fdt)) unpacked = rc__malloc(numel ? (size_t)numel : 1);
  if (!dst || (is_sub_byte(fdt) && !unpacked)) {
    rc__free(dst);
    rc__free(unpacked);
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", what);
  }
  uint8_t *ints = unpacked ? unpacked : dst;
  const float *f = t->data;
  rc_status st = RC_OK;
  if (!convert) {
    if (fdt == RC_DTYPE_FLOAT || fdt == RC_DTYPE_DOUBLE || fdt == RC_DTYPE_FLOAT16 ||
        fdt == RC_DTYPE_BFLOAT16) {
      for (int64_t i = 0; i < numel && st == RC_OK; i++) {
        int nan;
        if (fdt == RC_DTYPE_FLOAT) nan = isnan(f[i]);
        else if (fdt == RC_DTYPE_DOUBLE) nan = isnan(((const double *)t->data)[i]);
        else {
          uint16_t h = ((const uint16_t *)t->data)[i];
          nan = fdt == RC_DTYPE_FLOAT16 ? (h & 0x7c00u) == 0x7c00u && (h & 0x3ffu)
                                         : (h & 0x7f80u) == 0x7f80u && (h & 0x7fu);
        }
        if (nan) st = encode_fail(e, what, "is NaN", i, NAN);
      }
    }
    if (st == RC_OK && is_sub_byte(fdt)) st = check_4bit(t->data, numel, fdt, what, e);
    if (st == RC_OK) {
      size_t mem = (size_t)numel * rc_dtype_size(fdt);
      if (mem) memcpy(ints, t->data, mem);
      if (fdt == RC_DTYPE_BOOL)
        for (int64_t i = 0; i < numel; i++) ints[i] = ints[i] != 0;
    }
  } else {
    for (int64_t i = 0; i < numel && st == RC_OK; i++) {
      if (fdt == RC_DTYPE_DOUBLE || fdt == RC_DTYPE_FLOAT16 || fdt == RC_DTYPE_BFLOAT16) {
        if (isnan(f[i])) {
          st = encode_fail(e, what, "is NaN", i, f[i]);
        } else if (fdt == RC_DTYPE_DOUBLE) {
          double d = f[i];
          memcpy(dst + 8 * i, &d, 8);
        } else {
          uint16_t h = fdt == RC_DTYPE_FLOAT16 ? rc__float_to_half(f[i]) : rc__float_to_bfloat16(f[i]);
          memcpy(dst + 2 * i, &h, 2);
        }
      } else {
        double lo, hi;
        int64_t v = 0;
        int_range(fdt, &lo, &hi);
        st = float_to_int(f[i], lo, hi, what, i, &v, e);
        if (st == RC_OK) store_int(ints, is_sub_byte(fdt) ? RC_DTYPE_UINT8 : fdt, i, v);
      }
    }
  }
  if (st == RC_OK && unpacked)
    for (int64_t i = 0; i < numel; i++)
      dst[i / 2] |= (uint8_t)((unpacked[i] & 0x0f) << ((i & 1) * 4));
  rc__free(unpacked);
  if (st != RC_OK) {
    rc__free(dst);
    return st;
  }
  *raw = dst;
  *n_out = n;
  return RC_OK;
}

/* ---- serialised messages ---- */

static void *malloc_cb(void *unused, size_t n) { return rc__malloc(n); }

rc_status rc__tensorproto_decode_bytes(const uint8_t *buf, size_t n, const char *path, const char *dir,
                                       rc_tensor *out, void **owned, size_t max_bytes, rc_err *e) {
  *owned = NULL;
  rc__pb_alloc pa;
  rc__pb_alloc_init(&pa, rc__pb_alloc_cap(n));
  Onnx__TensorProto *t = onnx__tensor_proto__unpack(&pa.base, n, buf);
  if (!t && pa.out_of_memory) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory reading the tensor", path);
  if (!t)
    return rc__fail(e, pa.hit_cap ? RC_ERR_LIMIT : RC_ERR_FORMAT, "%s: %s", path,
                    pa.hit_cap ? "message needs more memory than its size allows"
                               : "not an ONNX TensorProto file");
  char what[320];
  snprintf(what, sizeof what, "tensor '%.256s'", t->name ? t->name : "");
  rc__decode_ctx ctx = {path, dir, max_bytes, NULL, 0, RC_MAX_RANK, malloc_cb, NULL};
  rc_status st = rc__tensor_decode(t, what, &ctx, out, e);
  onnx__tensor_proto__free_unpacked(t, &pa.base);
  if (st != RC_OK) {
    rc__free(out->data);
    memset(out, 0, sizeof *out);
    return st;
  }
  *owned = out->data;
  return RC_OK;
}
