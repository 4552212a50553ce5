/* Writing arrays: NumPy .npy (format 1.0) and .npz (a stored zip of .npy
 * members), as the NumPy format specification (numpy.lib.format) defines. */
#include <stdio.h>
#include <string.h>
#include <zlib.h>

#include "core/alloc.h"
#include "core/file.h"
#include "data/npy_write.h"

static const char *descr_of(rc_dtype t) {
  switch (t) {
    case RC_DTYPE_FLOAT: return "<f4";
    case RC_DTYPE_DOUBLE: return "<f8";
    case RC_DTYPE_INT64: return "<i8";
    case RC_DTYPE_INT32: return "<i4";
    case RC_DTYPE_INT16: return "<i2";
    case RC_DTYPE_UINT16: return "<u2";
    case RC_DTYPE_INT8: return "|i1";
    case RC_DTYPE_UINT8: return "|u1";
    case RC_DTYPE_BOOL: return "|b1";
    default: return NULL;
  }
}

rc_status rc_npy_encode(unsigned char **out, size_t *out_n, const rc_tensor *t, rc_err *e) {
  const char *descr = descr_of(t->dtype);
  if (!descr) return rc__fail(e, RC_ERR_UNSUPPORTED, "cannot write dtype %s as .npy", rc_dtype_name(t->dtype));
  char shape[256];
  size_t used = 0;
  used += (size_t)snprintf(shape, sizeof shape, "(");
  for (int i = 0; i < t->rank; i++)
    used += (size_t)snprintf(shape + used, sizeof shape - used, "%lld%s", (long long)t->dims[i],
                             t->rank == 1 ? "," : i + 1 < t->rank ? ", " : "");
  snprintf(shape + used, sizeof shape - used, ")");
  char header[512];
  int hl = snprintf(header, sizeof header, "{'descr': '%s', 'fortran_order': False, 'shape': %s, }", descr, shape);
  /* Magic (6) + version (2) + length (2) + header + padding + '\n' is a multiple of 64. */
  size_t total_head = 10 + (size_t)hl + 1;
  size_t pad = (64 - total_head % 64) % 64;
  size_t head_len = (size_t)hl + pad + 1;
  size_t data = rc_tensor_nbytes(t);
  size_t n = 10 + head_len + data;
  unsigned char *buf = rc__malloc(n);
  if (!buf) return rc__fail(e, RC_ERR_NOMEM, "out of memory encoding .npy");
  memcpy(buf, "\x93NUMPY\x01\x00", 8);
  buf[8] = (unsigned char)(head_len & 0xff);
  buf[9] = (unsigned char)(head_len >> 8);
  memcpy(buf + 10, header, (size_t)hl);
  memset(buf + 10 + hl, ' ', pad);
  buf[10 + head_len - 1] = '\n';
  if (data) memcpy(buf + 10 + head_len, t->data, data);
  *out = buf;
  *out_n = n;
  return RC_OK;
}

rc_status rc_npy_write(const char *path, const rc_tensor *t, rc_err *e) {
  unsigned char *buf;
  size_t n;
  RC_TRY(rc_npy_encode(&buf, &n, t, e));
  rc_status st = rc__write_atomic(path, buf, n, e);
  rc__free(buf);
  return st;
}

static void put16(unsigned char *p, unsigned v) {
  p[0] = (unsigned char)v;
  p[1] = (unsigned char)(v >> 8);
}
static void put32(unsigned char *p, uint32_t v) {
  put16(p, v & 0xffff);
  put16(p + 2, v >> 16);
}

rc_status rc_npz_write(const char *path, const char *const *names, const rc_tensor *tensors, int n,
                       rc_err *e) {
  unsigned char **members = rc__calloc((size_t)n + 1, sizeof *members);
  size_t *sizes = rc__calloc((size_t)n + 1, sizeof *sizes);
  unsigned char *zip = NULL;
  rc_status st = RC_OK;
  if (!members || !sizes) {
    st = rc__fail(e, RC_ERR_NOMEM, "out of memory writing %s", path);
    goto out;
  }
  size_t total = 22;
  for (int i = 0; i < n; i++) {
    if ((st = rc_npy_encode(&members[i], &sizes[i], &tensors[i], e)) != RC_OK) goto out;
    size_t name_len = strlen(names[i]) + 4;
    if (sizes[i] >= 0xffffffffu || name_len > 0xffff) {
      st = rc__fail(e, RC_ERR_LIMIT, "%s: member '%s' too large for a zip without zip64", path, names[i]);
      goto out;
    }
    total += 30 + name_len + sizes[i] + 46 + name_len;
  }
  if (total >= 0xffffffffu) {
    st = rc__fail(e, RC_ERR_LIMIT, "%s: archive too large for a zip without zip64", path);
    goto out;
  }
  zip = rc__malloc(total);
  if (!zip) {
    st = rc__fail(e, RC_ERR_NOMEM, "out of memory writing %s", path);
    goto out;
  }
  size_t off = 0;
  uint32_t crcs[64];
  size_t offsets[64], lens[64];
  if (n > 64) {
    st = rc__fail(e, RC_ERR_LIMIT, "%s: more than 64 outputs", path);
    goto out;
  }
  for (int i = 0; i < n; i++) {
    size_t nl = strlen(names[i]) + 4;
    uint32_t crc = (uint32_t)crc32(0L, members[i], (uInt)sizes[i]);
    crcs[i] = crc;
    offsets[i] = off;
    lens[i] = sizes[i];
    unsigned char *h = zip + off;
    put32(h, 0x04034b50);
    put16(h + 4, 20);
    put16(h + 6, 0);
    put16(h + 8, 0); /* stored */
    put16(h + 10, 0);
    put16(h + 12, 0x21); /* 1980-01-01: fixed, so equal arrays give equal files */
    put32(h + 14, crc);
    put32(h + 18, (uint32_t)sizes[i]);
    put32(h + 22, (uint32_t)sizes[i]);
    put16(h + 26, (unsigned)nl);
    put16(h + 28, 0);
    memcpy(h + 30, names[i], nl - 4);
    memcpy(h + 30 + nl - 4, ".npy", 4);
    memcpy(h + 30 + nl, members[i], sizes[i]);
    off += 30 + nl + sizes[i];
  }
  size_t cd_start = off;
  for (int i = 0; i < n; i++) {
    size_t nl = strlen(names[i]) + 4;
    unsigned char *c = zip + off;
    put32(c, 0x02014b50);
    put16(c + 4, 20);
    put16(c + 6, 20);
    put16(c + 8, 0);
    put16(c + 10, 0);
    put16(c + 12, 0);
    put16(c + 14, 0x21);
    put32(c + 16, crcs[i]);
    put32(c + 20, (uint32_t)lens[i]);
    put32(c + 24, (uint32_t)lens[i]);
    put16(c + 28, (unsigned)nl);
    put16(c + 30, 0);
    put16(c + 32, 0);
    put16(c + 34, 0);
    put16(c + 36, 0);
    put32(c + 38, 0);
    put32(c + 42, (uint32_t)offsets[i]);
    memcpy(c + 46, names[i], nl - 4);
    memcpy(c + 46 + nl - 4, ".npy", 4);
    off += 46 + nl;
  }
  unsigned char *end = zip + off;
  put32(end, 0x06054b50);
  put16(end + 4, 0);
  put16(end + 6, 0);
  put16(end + 8, (unsigned)n);
  put16(end + 10, (unsigned)n);
  put32(end + 12, (uint32_t)(off - cd_start));
  put32(end + 16, (uint32_t)cd_start);
  put16(end + 20, 0);
  off += 22;
  st = rc__write_atomic(path, zip, off, e);
out:
  if (members)
    for (int i = 0; i < n; i++) rc__free(members[i]);
  rc__free(members);
  rc__free(sizes);
  rc__free(zip);
  return st;
}
