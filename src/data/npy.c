/* NumPy .npy reader, per the format description in numpy.lib.format:
 *   "\x93NUMPY", major, minor (1.0, 2.0 or 3.0),
 *   header length (uint16 LE for 1.0, uint32 LE for 2.0/3.0),
 *   a Python dict literal {'descr': ..., 'fortran_order': ..., 'shape': (...)}
 *   padded with spaces and ended by '\n', then the raw array data.
 * The header parser accepts that literal grammar and nothing more: it never
 * evaluates Python. */
#include <string.h>

#include "core/alloc.h"
#include "data/data_internal.h"

typedef struct cursor {
  const char *p, *end;
} cursor;

static void skip_ws(cursor *c) {
  while (c->p < c->end && (*c->p == ' ' || *c->p == '\t' || *c->p == '\n' || *c->p == '\r')) c->p++;
}

static int accept(cursor *c, char ch) {
  skip_ws(c);
  if (c->p < c->end && *c->p == ch) {
    c->p++;
    return 1;
  }
  return 0;
}

static long offset_of(const cursor *c, const char *start) { return (long)(c->p - start); }

/* A quoted string without escapes, copied into out (NUL-terminated). */
static rc_status parse_string(cursor *c, char *out, size_t cap, const char *start, rc_err *e) {
  skip_ws(c);
  if (c->p >= c->end || (*c->p != '\'' && *c->p != '"'))
    return rc__fail(e, RC_ERR_FORMAT, "header: expected a quoted string at offset %ld", offset_of(c, start));
  char q = *c->p++;
  size_t len = 0;
  while (c->p < c->end && *c->p != q) {
    if (*c->p == '\\')
      return rc__fail(e, RC_ERR_FORMAT, "header: escape sequences in strings are not part of the format");
    if (len + 1 >= cap) return rc__fail(e, RC_ERR_FORMAT, "header: string at offset %ld too long", offset_of(c, start));
    out[len++] = *c->p++;
  }
  if (c->p >= c->end) return rc__fail(e, RC_ERR_FORMAT, "header: unterminated string");
  c->p++;
  out[len] = '\0';
  return RC_OK;
}

static int accept_word(cursor *c, const char *w) {
  skip_ws(c);
  size_t n = strlen(w);
  if ((size_t)(c->end - c->p) >= n && !memcmp(c->p, w, n)) {
    c->p += n;
    return 1;
  }
  return 0;
}

/* (d0, d1, ...) with an optional trailing comma; "()" is a scalar. Python 2
 * era writers appended 'L' to long integers: accepted. */
static rc_status parse_shape(cursor *c, int64_t *dims, int *rank, const char *start, rc_err *e) {
  if (!accept(c, '('))
    return rc__fail(e, RC_ERR_FORMAT, "header: 'shape' must be a tuple, offset %ld", offset_of(c, start));
  *rank = 0;
  for (;;) {
    if (accept(c, ')')) return RC_OK;
    skip_ws(c);
    int neg = 0;
    if (c->p < c->end && *c->p == '-') {
      neg = 1;
      c->p++;
    }
    if (c->p >= c->end || *c->p < '0' || *c->p > '9')
      return rc__fail(e, RC_ERR_FORMAT, "header: expected an integer in 'shape' at offset %ld", offset_of(c, start));
    uint64_t v = 0;
    while (c->p < c->end && *c->p >= '0' && *c->p <= '9') {
      unsigned d = (unsigned)(*c->p++ - '0');
      if (v > ((uint64_t)INT64_MAX - d) / 10)
        return rc__fail(e, RC_ERR_LIMIT, "header: dimension %d does not fit in 64 bits", *rank);
      v = v * 10 + d;
    }
    if (c->p < c->end && *c->p == 'L') c->p++;
    if (neg && v)
      return rc__fail(e, RC_ERR_FORMAT, "header: dimension %d is negative (-%llu)", *rank, (unsigned long long)v);
    if (*rank >= RC_MAX_RANK)
      return rc__fail(e, RC_ERR_UNSUPPORTED, "header: shape has more than %d dimensions", RC_MAX_RANK);
    dims[(*rank)++] = (int64_t)v;
    if (accept(c, ')')) return RC_OK;
    if (!accept(c, ','))
      return rc__fail(e, RC_ERR_FORMAT, "header: expected ',' or ')' in 'shape' at offset %ld", offset_of(c, start));
  }
}

/* descr such as '<f4' or '|u1' into a dtype; refuses with the reason. */
static rc_status dtype_from_descr(const char *d, rc_dtype *dt, rc_err *e) {
  char order = d[0];
  if (order != '<' && order != '>' && order != '|' && order != '=')
    return rc__fail(e, RC_ERR_UNSUPPORTED, "dtype '%s' is not a plain numeric type", d);
  char kind = d[1];
  if (kind == 'O')
    return rc__fail(e, RC_ERR_UNSUPPORTED,
                    "dtype '%s' holds pickled Python objects, which are never loaded (save a numeric array)", d);
  int size = 0;
  const char *q = d + 2;
  if (*q < '1' || *q > '9') return rc__fail(e, RC_ERR_UNSUPPORTED, "dtype '%s' is not a plain numeric type", d);
  while (*q >= '0' && *q <= '9' && size < 1000) size = size * 10 + (*q++ - '0');
  if (*q) return rc__fail(e, RC_ERR_UNSUPPORTED, "dtype '%s' is not a plain numeric type", d);
  rc_dtype t = RC_DTYPE_UNDEFINED;
  switch (kind) {
    case 'b': if (size == 1) t = RC_DTYPE_BOOL; break;
    case 'u':
      t = size == 1 ? RC_DTYPE_UINT8 : size == 2 ? RC_DTYPE_UINT16 : size == 4 ? RC_DTYPE_UINT32
        : size == 8 ? RC_DTYPE_UINT64 : RC_DTYPE_UNDEFINED;
      break;
    case 'i':
      t = size == 1 ? RC_DTYPE_INT8 : size == 2 ? RC_DTYPE_INT16 : size == 4 ? RC_DTYPE_INT32
        : size == 8 ? RC_DTYPE_INT64 : RC_DTYPE_UNDEFINED;
      break;
    case 'f':
      t = size == 2 ? RC_DTYPE_FLOAT16 : size == 4 ? RC_DTYPE_FLOAT : size == 8 ? RC_DTYPE_DOUBLE
        : RC_DTYPE_UNDEFINED;
      break;
    default: break;
  }
  if (t == RC_DTYPE_UNDEFINED)
    return rc__fail(e, RC_ERR_UNSUPPORTED,
                    "dtype '%s' is not supported (bool, int8..int64, uint8..uint64, float16/32/64)", d);
  /* '=' is native order: numpy writes an explicit '<' or '>' instead, but a
   * hand-made header may say '='; on a little-endian host it is '<'. */
  if (order == '>' && size > 1)
    return rc__fail(e, RC_ERR_UNSUPPORTED,
                    "dtype '%s' is big-endian; convert with arr.astype(arr.dtype.newbyteorder('<'))", d);
  if (order == '=' && size > 1) {
    const uint16_t one = 1;
    unsigned char b;
    memcpy(&b, &one, 1);
    if (b != 1) return rc__fail(e, RC_ERR_UNSUPPORTED, "dtype '%s': native order on a big-endian host", d);
  }
  *dt = t;
  return RC_OK;
}

typedef struct npy_header {
  char descr[64];
  int fortran_order;
  int64_t dims[RC_MAX_RANK];
  int rank;
} npy_header;

static rc_status parse_dict(npy_header *h, const char *text, size_t len, rc_err *e) {
  cursor c = {text, text + len};
  int seen_descr = 0, seen_fortran = 0, seen_shape = 0;
  if (!accept(&c, '{')) return rc__fail(e, RC_ERR_FORMAT, "header: does not start with '{'");
  for (;;) {
    if (accept(&c, '}')) break;
    char key[32];
    RC_TRY(parse_string(&c, key, sizeof key, text, e));
    if (!accept(&c, ':')) return rc__fail(e, RC_ERR_FORMAT, "header: expected ':' after '%s'", key);
    if (!strcmp(key, "descr")) {
      if (seen_descr++) return rc__fail(e, RC_ERR_FORMAT, "header: key 'descr' given twice");
      skip_ws(&c);
      if (c.p < c.end && *c.p == '[')
        return rc__fail(e, RC_ERR_UNSUPPORTED, "header: structured dtypes (a list in 'descr') are not supported");
      RC_TRY(parse_string(&c, h->descr, sizeof h->descr, text, e));
    } else if (!strcmp(key, "fortran_order")) {
      if (seen_fortran++) return rc__fail(e, RC_ERR_FORMAT, "header: key 'fortran_order' given twice");
      if (accept_word(&c, "True")) h->fortran_order = 1;
      else if (accept_word(&c, "False")) h->fortran_order = 0;
      else return rc__fail(e, RC_ERR_FORMAT, "header: 'fortran_order' must be True or False");
    } else if (!strcmp(key, "shape")) {
      if (seen_shape++) return rc__fail(e, RC_ERR_FORMAT, "header: key 'shape' given twice");
      RC_TRY(parse_shape(&c, h->dims, &h->rank, text, e));
    } else {
      return rc__fail(e, RC_ERR_FORMAT, "header: unexpected key '%s' (expected descr, fortran_order, shape)", key);
    }
    if (accept(&c, '}')) break;
    if (!accept(&c, ',')) return rc__fail(e, RC_ERR_FORMAT, "header: expected ',' or '}' at offset %ld", offset_of(&c, text));
  }
  skip_ws(&c);
  if (c.p != c.end) return rc__fail(e, RC_ERR_FORMAT, "header: unexpected text after the closing '}'");
  if (!seen_descr || !seen_fortran || !seen_shape)
    return rc__fail(e, RC_ERR_FORMAT, "header: missing key '%s'",
                    !seen_descr ? "descr" : !seen_fortran ? "fortran_order" : "shape");
  return RC_OK;
}

rc_status rc__npy_read(rc_array *out, rc__src *s, rc_err *e) {
  const unsigned char *p = s->p;
  size_t n = s->n;
  if (n < 6 || memcmp(p, "\x93NUMPY", 6) != 0)
    return rc__fail(e, RC_ERR_FORMAT, "not a .npy file (it does not start with \\x93NUMPY)");
  if (n < 10) return rc__fail(e, RC_ERR_FORMAT, "truncated: %zu bytes, shorter than a .npy preamble", n);
  int major = p[6], minor = p[7];
  if ((major != 1 && major != 2 && major != 3) || minor != 0)
    return rc__fail(e, RC_ERR_UNSUPPORTED, ".npy format version %d.%d (1.0, 2.0 and 3.0 are read)", major, minor);
  size_t pre = major == 1 ? 10 : 12;
  if (n < pre) return rc__fail(e, RC_ERR_FORMAT, "truncated: %zu bytes, shorter than a version %d.0 preamble", n, major);
  size_t hlen = major == 1 ? rc__le16(p + 8) : rc__le32(p + 8);
  if (hlen > RC__NPY_MAX_HEADER)
    return rc__fail(e, RC_ERR_LIMIT, "header length %zu is over the limit of %zu bytes", hlen, RC__NPY_MAX_HEADER);
  if (hlen > n - pre)
    return rc__fail(e, RC_ERR_FORMAT, "truncated: header needs %zu bytes, only %zu follow the preamble", hlen, n - pre);
  npy_header h;
  memset(&h, 0, sizeof h);
  RC_TRY(parse_dict(&h, (const char *)p + pre, hlen, e));
  rc_dtype dt = RC_DTYPE_UNDEFINED;
  RC_TRY(dtype_from_descr(h.descr, &dt, e));
  if (h.fortran_order) {
    /* Column-major equals row-major when at most one dimension exceeds 1. */
    int big = 0;
    for (int i = 0; i < h.rank; i++) big += h.dims[i] > 1;
    if (big > 1)
      return rc__fail(e, RC_ERR_UNSUPPORTED,
                      "array is in Fortran (column-major) order; save it with np.ascontiguousarray first");
  }
  memset(out, 0, sizeof *out);
  out->t.dtype = dt;
  out->t.rank = h.rank;
  memcpy(out->t.dims, h.dims, sizeof h.dims);
  size_t need = rc_tensor_nbytes(&out->t);
  char shape[128];
  rc_shape_str(&out->t, shape, sizeof shape);
  if (need == SIZE_MAX)
    return rc__fail(e, RC_ERR_LIMIT, "shape %s of %s overflows the address space", shape, rc_dtype_name(dt));
  if (need > s->max_bytes)
    return rc__fail(e, RC_ERR_LIMIT, "shape %s of %s needs %zu bytes, over the limit of %zu", shape,
                    rc_dtype_name(dt), need, s->max_bytes);
  size_t have = n - pre - hlen;
  if (have < need)
    return rc__fail(e, RC_ERR_FORMAT, "truncated: shape %s of %s needs %zu data bytes, the file has %zu",
                    shape, rc_dtype_name(dt), need, have);
  if (have > need)
    return rc__fail(e, RC_ERR_FORMAT,
                    "%zu bytes follow the %zu data bytes of shape %s (several arrays in one file?)",
                    have - need, need, shape);
  return rc__take_payload(out, s, pre + hlen, need, rc_dtype_size(dt), 1, e);
}
