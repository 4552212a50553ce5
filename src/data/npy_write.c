/* Writing arrays: NumPy .npy (format 1.0) and .npz (a stored zip of .npy
 * members, the container written by libzip), as the NumPy format
 * specification (numpy.lib.format) defines. */
#include <stdio.h>
#include <string.h>
#include <time.h>
#include <zip.h>

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

/* Member times fixed at 1980-01-01 00:00, the zip epoch, so that equal arrays
 * give equal files. libzip stores local time (DOS fields), so the instant is
 * that of local midnight: the stored fields are then the same in every zone. */
static time_t zip_epoch(void) {
  struct tm t = {0};
  t.tm_year = 80;
  t.tm_mday = 1;
  t.tm_isdst = -1;
  return mktime(&t);
}

static rc_status zip_write_fail(rc_err *e, const char *path, zip_error_t *ze) {
  rc_status st = rc__fail(e, zip_error_code_zip(ze) == ZIP_ER_MEMORY ? RC_ERR_NOMEM : RC_ERR_IO,
                          "%s: writing the zip container: %s", path, zip_error_strerror(ze));
  zip_error_fini(ze);
  return st;
}

/* The finished archive's bytes out of libzip's in-memory target. */
static rc_status take_bytes(zip_source_t *target, unsigned char **out, size_t *n, const char *path, rc_err *e) {
  *out = NULL;
  zip_stat_t st;
  zip_stat_init(&st);
  if (zip_source_stat(target, &st) != 0 || !(st.valid & ZIP_STAT_SIZE) || zip_source_open(target) != 0)
    return zip_write_fail(e, path, zip_source_error(target));
  unsigned char *buf = rc__malloc((size_t)st.size + 1);
  zip_int64_t got = buf ? zip_source_read(target, buf, st.size) : -1;
  zip_source_close(target);
  if (!buf) return rc__fail(e, RC_ERR_NOMEM, "out of memory writing %s", path);
  if (got < 0 || (zip_uint64_t)got != st.size) {
    rc__free(buf);
    return zip_write_fail(e, path, zip_source_error(target));
  }
  *out = buf;
  *n = (size_t)st.size;
  return RC_OK;
}

rc_status rc_npz_write(const char *path, const char *const *names, const rc_tensor *tensors, int n,
                       rc_err *e) {
  unsigned char **members = rc__calloc((size_t)n + 1, sizeof *members);
  unsigned char *bytes = NULL;
  size_t nbytes = 0;
  zip_error_t ze;
  zip_error_init(&ze);
  zip_source_t *target = zip_source_buffer_create(NULL, 0, 0, &ze);
  zip_t *za = NULL;
  rc_status st = RC_OK;
  if (!members) {
    st = rc__fail(e, RC_ERR_NOMEM, "out of memory writing %s", path);
    goto out;
  }
  if (!target) {
    st = zip_write_fail(e, path, &ze);
    goto out;
  }
  zip_source_keep(target); /* read back after zip_close */
  if (!(za = zip_open_from_source(target, ZIP_CREATE | ZIP_TRUNCATE, &ze))) {
    st = zip_write_fail(e, path, &ze);
    goto out;
  }
  for (int i = 0; i < n; i++) {
    size_t size;
    if ((st = rc_npy_encode(&members[i], &size, &tensors[i], e)) != RC_OK) goto out;
    char name[1024];
    if (snprintf(name, sizeof name, "%s.npy", names[i]) >= (int)sizeof name) {
      st = rc__fail(e, RC_ERR_LIMIT, "%s: member name '%.64s...' too long", path, names[i]);
      goto out;
    }
    zip_source_t *m = zip_source_buffer(za, members[i], size, 0);
    zip_int64_t at = m ? zip_file_add(za, name, m, ZIP_FL_ENC_UTF_8) : -1;
    if (at < 0) {
      zip_source_free(m);
      st = zip_write_fail(e, path, zip_get_error(za));
      goto out;
    }
    if (zip_set_file_compression(za, (zip_uint64_t)at, ZIP_CM_STORE, 0) != 0 ||
        zip_file_set_mtime(za, (zip_uint64_t)at, zip_epoch(), 0) != 0) {
      st = zip_write_fail(e, path, zip_get_error(za));
      goto out;
    }
  }
  if (zip_close(za) != 0) {
    st = zip_write_fail(e, path, zip_get_error(za));
    goto out;
  }
  za = NULL;
  if ((st = take_bytes(target, &bytes, &nbytes, path, e)) != RC_OK) goto out;
  st = rc__write_atomic(path, bytes, nbytes, e);
out:
  if (za) zip_discard(za);
  if (target) zip_source_free(target);
  if (members)
    for (int i = 0; i < n; i++) rc__free(members[i]);
  rc__free(members);
  rc__free(bytes);
  zip_error_fini(&ze);
  return st;
}
