/* IDX, the format of the MNIST family of datasets: two zero bytes, a type
 * code, a dimension count, one big-endian uint32 per dimension, then the
 * data in big-endian C order. Often shipped gzip-compressed; gunzip here
 * inflates any gzip stream with a hard output limit against bombs. */
#include <string.h>
#include <zlib.h>

#include "core/alloc.h"
#include "data/data_internal.h"

static rc_dtype idx_dtype(unsigned code) {
  switch (code) {
    case 0x08: return RC_DTYPE_UINT8;
    case 0x09: return RC_DTYPE_INT8;
    case 0x0B: return RC_DTYPE_INT16;
    case 0x0C: return RC_DTYPE_INT32;
    case 0x0D: return RC_DTYPE_FLOAT;
    case 0x0E: return RC_DTYPE_DOUBLE;
    default: return RC_DTYPE_UNDEFINED;
  }
}

rc_status rc__idx_read(rc_array *out, rc__src *s, rc_err *e) {
  const unsigned char *p = s->p;
  size_t n = s->n;
  if (n < 4) return rc__fail(e, RC_ERR_FORMAT, "truncated: %zu bytes, shorter than the 4-byte IDX magic", n);
  if (p[0] || p[1])
    return rc__fail(e, RC_ERR_FORMAT, "not an IDX file (magic %02x %02x %02x %02x; the first two bytes must be 0)",
                    p[0], p[1], p[2], p[3]);
  rc_dtype dt = idx_dtype(p[2]);
  if (dt == RC_DTYPE_UNDEFINED)
    return rc__fail(e, RC_ERR_FORMAT, "IDX type code 0x%02x is not one of 08, 09, 0B, 0C, 0D, 0E", p[2]);
  int rank = p[3];
  if (rank == 0) return rc__fail(e, RC_ERR_FORMAT, "IDX header has 0 dimensions");
  if (rank > RC_MAX_RANK)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "IDX header has %d dimensions, at most %d are supported", rank, RC_MAX_RANK);
  size_t hdr = 4 + 4 * (size_t)rank;
  if (n < hdr)
    return rc__fail(e, RC_ERR_FORMAT, "truncated: the header of %d dimensions needs %zu bytes, the file has %zu",
                    rank, hdr, n);
  memset(out, 0, sizeof *out);
  out->t.dtype = dt;
  out->t.rank = rank;
  for (int i = 0; i < rank; i++) out->t.dims[i] = rc__be32(p + 4 + 4 * (size_t)i);
  char shape[128];
  rc_shape_str(&out->t, shape, sizeof shape);
  size_t need = rc_tensor_nbytes(&out->t);
  if (need == SIZE_MAX)
    return rc__fail(e, RC_ERR_LIMIT, "shape %s of %s overflows the address space", shape, rc_dtype_name(dt));
  if (need > s->max_bytes)
    return rc__fail(e, RC_ERR_LIMIT, "shape %s of %s needs %zu bytes, over the limit of %zu", shape,
                    rc_dtype_name(dt), need, s->max_bytes);
  size_t have = n - hdr;
  if (have < need)
    return rc__fail(e, RC_ERR_FORMAT, "truncated: shape %s of %s needs %zu data bytes, the file has %zu", shape,
                    rc_dtype_name(dt), need, have);
  if (have > need)
    return rc__fail(e, RC_ERR_FORMAT, "%zu bytes follow the %zu data bytes of shape %s", have - need, need, shape);
  return rc__take_payload(out, s, hdr, need, rc_dtype_size(dt), 0, e);
}

static int all_zero(const unsigned char *p, size_t n) {
  for (size_t i = 0; i < n; i++)
    if (p[i]) return 0;
  return 1;
}

static rc_status over_limit(size_t limit, rc_err *e) {
  return rc__fail(e, RC_ERR_LIMIT,
                  "gzip data inflates past the limit of %zu bytes (a decompression bomb, or raise the limit)", limit);
}

rc_status rc__gunzip(unsigned char **out, size_t *out_n, const unsigned char *p, size_t n, size_t limit,
                     rc_err *e) {
  *out = NULL;
  *out_n = 0;
  if (n < 18) return rc__fail(e, RC_ERR_FORMAT, "truncated gzip stream (%zu bytes)", n);
  /* The trailer's ISIZE (size mod 2^32) is a good first guess; growth is
   * bounded by limit whatever the stream claims. */
  size_t cap = rc__le32(p + n - 4);
  /* Deflate expands at most about 1032:1 (zlib's documented bound, quoted
   * from memory), so a short stream that claims gigabytes is not believed
   * up front: a damaged trailer would otherwise allocate up to the limit. */
  if (n < SIZE_MAX / 1032 && cap > n * 1032) cap = n * 1032;
  if (cap < 4096) cap = 4096;
  if (cap > limit) cap = limit;
  if (cap == SIZE_MAX) cap--;
  unsigned char *buf = rc__malloc(cap + 1);
  if (!buf) return rc__fail(e, RC_ERR_NOMEM, "out of memory for %zu bytes", cap + 1);
  z_stream zs;
  memset(&zs, 0, sizeof zs);
  if (inflateInit2(&zs, 16 + MAX_WBITS) != Z_OK) {
    rc__free(buf);
    return rc__fail(e, RC_ERR_NOMEM, "zlib: cannot start inflate");
  }
  size_t in_pos = 0, got = 0;
  rc_status st = RC_OK;
  for (;;) {
    if (zs.avail_in == 0 && in_pos < n) {
      size_t k = n - in_pos > UINT32_MAX ? UINT32_MAX : n - in_pos;
      zs.next_in = (unsigned char *)p + in_pos;
      zs.avail_in = (uInt)k;
      in_pos += k;
    }
    if (got > limit) {
      st = over_limit(limit, e);
      break;
    }
    if (got == cap + 1) {
      /* Full: grow, but never past limit + 1 (the byte that proves excess). */
      size_t ncap = cap > limit / 2 ? limit : cap * 2;
      if (ncap <= cap) {
        st = over_limit(limit, e);
        break;
      }
      unsigned char *nb = rc__realloc(buf, ncap + 1);
      if (!nb) {
        st = rc__fail(e, RC_ERR_NOMEM, "out of memory for %zu bytes", ncap + 1);
        break;
      }
      buf = nb;
      cap = ncap;
    }
    size_t room = cap + 1 - got;
    zs.next_out = buf + got;
    zs.avail_out = room > UINT32_MAX ? UINT32_MAX : (uInt)room;
    uInt before = zs.avail_out;
    int zr = inflate(&zs, Z_NO_FLUSH);
    got += before - zs.avail_out;
    if (zr == Z_STREAM_END) {
      size_t rest = zs.avail_in + (n - in_pos);
      const unsigned char *tail = zs.next_in;
      if (rest == 0 || (rest == zs.avail_in && all_zero(tail, rest))) break;
      if (rest >= 2 && tail[0] == 0x1f && tail[1] == 0x8b && zs.avail_in >= 2) {
        inflateReset(&zs); /* concatenated gzip members form one stream */
        continue;
      }
      st = rc__fail(e, RC_ERR_FORMAT, "%zu bytes of garbage after the gzip stream", rest);
      break;
    }
    if (zr == Z_OK) continue;
    if (zr == Z_BUF_ERROR && zs.avail_out > 0) {
      st = rc__fail(e, RC_ERR_FORMAT, "truncated gzip stream (ends after %zu inflated bytes)", got);
      break;
    }
    if (zr == Z_BUF_ERROR) continue;
    if (zr == Z_MEM_ERROR) st = rc__fail(e, RC_ERR_NOMEM, "zlib: out of memory");
    else st = rc__fail(e, RC_ERR_FORMAT, "corrupt gzip data (zlib: %s)", zs.msg ? zs.msg : "data error");
    break;
  }
  inflateEnd(&zs);
  if (st == RC_OK && got > limit)
    st = over_limit(limit, e);
  if (st != RC_OK) {
    rc__free(buf);
    return st;
  }
  *out = buf;
  *out_n = got;
  return RC_OK;
}
