/* Owned arrays, format detection and the file/memory entry points. Files are
 * mapped read-only rather than read, so a large .npz costs address space,
 * not a second heap copy, and the input file is never modified. */
#define _DEFAULT_SOURCE /* madvise */

#include <errno.h>
#include <fcntl.h>
#include <stdio.h>
#include <string.h>
#include <sys/mman.h>
#include <sys/stat.h>
#include <unistd.h>

#include "core/alloc.h"
#include "data/data_internal.h"
#include "data/tensorproto.h"

void rc_array_free(rc_array *a) {
  if (!a) return;
  if (a->mapped)
    munmap(a->owned, a->mapped);
  else
    rc__free(a->owned);
  memset(a, 0, sizeof *a);
}

const char *rc_data_format_name(rc_data_format f) {
  switch (f) {
    case RC_DATA_NPY: return "NumPy .npy";
    case RC_DATA_NPZ: return "NumPy .npz (zip)";
    case RC_DATA_IDX: return "IDX";
    case RC_DATA_GZIP: return "gzip";
    case RC_DATA_TENSORPROTO: return "ONNX TensorProto";
    default: return "unknown";
  }
}

rc_data_format rc_data_detect(const void *buf, size_t n) {
  const unsigned char *p = buf;
  if (n >= 6 && !memcmp(p, "\x93NUMPY", 6)) return RC_DATA_NPY;
  if (n >= 4 && p[0] == 'P' && p[1] == 'K' &&
      ((p[2] == 3 && p[3] == 4) || (p[2] == 5 && p[3] == 6)))
    return RC_DATA_NPZ;
  if (n >= 2 && p[0] == 0x1f && p[1] == 0x8b) return RC_DATA_GZIP;
  /* IDX: two zero bytes, a type code, a dimension count. No protobuf message
   * starts with a zero byte (field number 0 is invalid), so .pb never matches. */
  if (n >= 4 && p[0] == 0 && p[1] == 0 && p[3] != 0 &&
      (p[2] == 0x08 || p[2] == 0x09 || (p[2] >= 0x0B && p[2] <= 0x0E)))
    return RC_DATA_IDX;
  return RC_DATA_AUTO;
}

static rc_data_format format_by_extension(const char *path) {
  if (rc__ends_with_ci(path, ".npy")) return RC_DATA_NPY;
  if (rc__ends_with_ci(path, ".npz") || rc__ends_with_ci(path, ".zip")) return RC_DATA_NPZ;
  if (rc__ends_with_ci(path, ".gz")) return RC_DATA_GZIP;
  if (rc__ends_with_ci(path, ".pb")) return RC_DATA_TENSORPROTO;
  if (rc__ends_with_ci(path, "-ubyte") || rc__ends_with_ci(path, ".idx")) return RC_DATA_IDX;
  return RC_DATA_AUTO;
}

/* The first (up to) 8 bytes as "68 65 6c ..." for messages. */
static const char *first_bytes(char hex[3 * 8 + 1], const unsigned char *p, size_t n) {
  hex[0] = '\0';
  for (size_t i = 0; i < n && i < 8; i++) snprintf(hex + 3 * i, 4, "%02x ", p[i]);
  if (hex[0]) hex[strlen(hex) - 1] = '\0';
  return n ? hex : "none";
}

static rc_status unknown_format(const unsigned char *p, size_t n, rc_err *e) {
  char hex[3 * 8 + 1];
  return rc__fail(e, RC_ERR_FORMAT,
                  "not a recognised data file (first bytes: %s); expected NumPy .npy or .npz, IDX "
                  "(plain or gzip), or ONNX TensorProto .pb",
                  n ? first_bytes(hex, p, n) : "none, the file is empty");
}

static rc_status read_gzip(rc_array *out, const rc__src *s, rc_err *e) {
  unsigned char *raw = NULL;
  size_t raw_n = 0;
  size_t limit = s->max_bytes > SIZE_MAX - RC__DATA_HEADER_SLACK ? SIZE_MAX
                                                                  : s->max_bytes + RC__DATA_HEADER_SLACK;
  RC_TRY(rc__gunzip(&raw, &raw_n, s->p, s->n, limit, e));
  rc__src inner = {raw, raw_n, raw, s->max_bytes, 0};
  rc_status st;
  switch (rc_data_detect(raw, raw_n)) {
    case RC_DATA_IDX: st = rc__idx_read(out, &inner, e); break;
    case RC_DATA_NPY: st = rc__npy_read(out, &inner, e); break;
    default: {
      char hex[3 * 8 + 1];
      st = rc__fail(e, RC_ERR_FORMAT, "gzip data holds neither IDX nor .npy data (first bytes inflated: %s)",
                    first_bytes(hex, raw, raw_n));
    }
  }
  rc__free(inner.heap); /* NULL when the reader adopted the block */
  return st;
}

/* Read from bytes whose format is known (not TensorProto). */
static rc_status read_known(rc_array *out, const rc__src *src, rc_data_format fmt,
                            const char *member, rc_err *e) {
  rc__src s = *src;
  if (member && fmt != RC_DATA_NPZ)
    return rc__fail(e, RC_ERR_INVALID, "a member name ('%s') applies to .npz archives only, this is %s data",
                    member, rc_data_format_name(fmt));
  switch (fmt) {
    case RC_DATA_NPY: return rc__npy_read(out, &s, e);
    case RC_DATA_NPZ: return rc__npz_read(out, &s, member, e);
    case RC_DATA_IDX: return rc__idx_read(out, &s, e);
    case RC_DATA_GZIP: return read_gzip(out, &s, e);
    default: return rc__fail(e, RC_ERR_UNSUPPORTED, "no reader for %s data here", rc_data_format_name(fmt));
  }
}


static rc_status named(rc_status st, rc_err *e, const char *name) {
  if (st != RC_OK && e) rc__wrap(e, "%s", name);
  return st;
}

static size_t effective_limit(size_t max_bytes) {
  return max_bytes ? max_bytes : RC_DATA_DEFAULT_MAX_BYTES;
}

rc_status rc_array_read_mem(rc_array *out, const void *buf, size_t n, rc_data_format fmt,
                            const char *name, const char *member, size_t max_bytes, rc_err *e) {
  memset(out, 0, sizeof *out);
  if (!name) name = "<memory>";
  if (!buf && n) return named(rc__fail(e, RC_ERR_INVALID, "no buffer"), e, name);
  if (fmt == RC_DATA_AUTO) fmt = rc_data_detect(buf, n);
  if (fmt == RC_DATA_AUTO) return named(unknown_format(buf, n, e), e, name);
  if (fmt == RC_DATA_TENSORPROTO)
    return named(rc__fail(e, RC_ERR_UNSUPPORTED, "ONNX TensorProto data is read from .pb files only"),
                 e, name);
  rc__src s = {buf, n, NULL, effective_limit(max_bytes), 0};
  rc_status st = read_known(out, &s, fmt, member, e);
  if (st != RC_OK) rc_array_free(out);
  return named(st, e, name);
}

/* A read-only view of a whole file. */
typedef struct mapped_file {
  const unsigned char *p;
  size_t n;
} mapped_file;

static rc_status map_file(mapped_file *m, const char *path, rc_err *e) {
  m->p = NULL;
  m->n = 0;
  int fd = open(path, O_RDONLY | O_CLOEXEC);
  if (fd < 0) return rc__fail(e, RC_ERR_IO, "cannot open: %s", strerror(errno));
  struct stat st;
  if (fstat(fd, &st) != 0) {
    int err = errno;
    close(fd);
    return rc__fail(e, RC_ERR_IO, "cannot stat: %s", strerror(err));
  }
  if (!S_ISREG(st.st_mode)) {
    close(fd);
    return rc__fail(e, RC_ERR_IO, "not a regular file");
  }
  if ((uintmax_t)st.st_size > SIZE_MAX) {
    close(fd);
    return rc__fail(e, RC_ERR_LIMIT, "file too large for this machine's address space");
  }
  m->n = (size_t)st.st_size;
  if (m->n == 0) {
    close(fd);
    return RC_OK;
  }
  void *p = mmap(NULL, m->n, PROT_READ, MAP_PRIVATE, fd, 0);
  int err = errno;
  close(fd);
  if (p == MAP_FAILED) return rc__fail(e, RC_ERR_IO, "cannot map the file: %s", strerror(err));
  m->p = p;
  return RC_OK;
}

static void unmap_file(mapped_file *m) {
  if (m->p) munmap((void *)m->p, m->n);
  m->p = NULL;
}

static rc_status read_tensorproto(rc_array *out, const char *path, const char *member,
                                  size_t max_bytes, rc_err *e) {
  if (member)
    return rc__fail(e, RC_ERR_INVALID, "a member name ('%s') applies to .npz archives only", member);
  void *owned = NULL;
  rc_status st = rc__tensorproto_file_read(path, &out->t, &owned, max_bytes, e);
  if (st != RC_OK) {
    rc__free(owned);
    memset(out, 0, sizeof *out);
    return st;
  }
  out->owned = owned;
  return RC_OK;
}

/* Map path and tell its format: by magic bytes, else by extension. */
static rc_status map_detect(mapped_file *m, rc_data_format *fmt, const char *path, rc_err *e) {
  RC_TRY(named(map_file(m, path, e), e, path));
  *fmt = rc_data_detect(m->p, m->n);
  if (*fmt == RC_DATA_AUTO) *fmt = format_by_extension(path);
  return RC_OK;
}

rc_status rc_array_read(rc_array *out, const char *path, const char *member, size_t max_bytes,
                        rc_err *e) {
  memset(out, 0, sizeof *out);
  mapped_file m;
  rc_data_format fmt;
  RC_TRY(map_detect(&m, &fmt, path, e));
  rc_status st;
  if (fmt == RC_DATA_TENSORPROTO) {
    unmap_file(&m);
    /* The ONNX module names the file in its own messages. */
    return read_tensorproto(out, path, member, effective_limit(max_bytes), e);
  }
  if (fmt == RC_DATA_AUTO) {
    st = unknown_format(m.p, m.n, e);
  } else if (m.n == 0) {
    st = rc__fail(e, RC_ERR_FORMAT, "empty file (expected %s data)", rc_data_format_name(fmt));
  } else {
    rc__src s = {m.p, m.n, NULL, effective_limit(max_bytes), 0};
    st = read_known(out, &s, fmt, member, e);
  }
  unmap_file(&m);
  if (st != RC_OK) rc_array_free(out);
  return named(st, e, path);
}

rc_status rc_array_map(rc_array *out, const char *path, size_t max_bytes, rc_err *e) {
  memset(out, 0, sizeof *out);
  mapped_file m;
  rc_data_format fmt;
  RC_TRY(map_detect(&m, &fmt, path, e));
  rc_status st;
  if (fmt != RC_DATA_NPY) {
    st = rc__fail(e, RC_ERR_UNSUPPORTED,
                  "%s data cannot be memory-mapped (compressed or not laid out as one array); "
                  "save it as an uncompressed .npy (numpy.save) to read it in place",
                  rc_data_format_name(fmt));
  } else {
    rc__src s = {m.p, m.n, NULL, effective_limit(max_bytes), 1};
    st = rc__npy_read(out, &s, e);
  }
  if (st != RC_OK) {
    unmap_file(&m);
    memset(out, 0, sizeof *out);
    return named(st, e, path);
  }
  out->owned = (void *)m.p;
  out->mapped = m.n;
  return RC_OK;
}

void rc_array_release_pages(const rc_array *a) {
  if (a && a->mapped) madvise(a->owned, a->mapped, MADV_DONTNEED);
}

rc_status rc_npz_list_mem(char ***names, int *count, const void *buf, size_t n, const char *name,
                          rc_err *e) {
  *names = NULL;
  *count = 0;
  return named(rc__npz_names(names, count, buf, n, e), e, name ? name : "<memory>");
}

rc_status rc_npz_list(char ***names, int *count, const char *path, rc_err *e) {
  *names = NULL;
  *count = 0;
  mapped_file m;
  RC_TRY(named(map_file(&m, path, e), e, path));
  rc_status st = rc__npz_names(names, count, m.p, m.n, e);
  unmap_file(&m);
  return named(st, e, path);
}

void rc_data_names_free(char **names) { rc__free(names); }
