/* External tensor data: a file beside the model holding raw bytes. The file
 * must stay inside the model's folder, so a model cannot read /etc/shadow or
 * ../../secret through a crafted location. */
#define _POSIX_C_SOURCE 200809L
#define _DEFAULT_SOURCE

#include <errno.h>
#include <fcntl.h>
#include <limits.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "core/alloc.h"
#include "ir/tensor_proto.h"

static int parse_int64(const char *s, int64_t *out) {
  if (!s || !*s) return 0;
  int64_t v = 0;
  for (const char *p = s; *p; p++) {
    if (*p < '0' || *p > '9') return 0;
    if (v > (INT64_MAX - (*p - '0')) / 10) return 0;
    v = v * 10 + (*p - '0');
  }
  *out = v;
  return 1;
}

rc_status rc__external_parse(const Onnx__TensorProto *t, const char *name, rc__external_ref *r,
                             rc_err *e) {
  r->location = NULL;
  r->offset = 0;
  r->length = -1;
  for (size_t i = 0; i < t->n_external_data; i++) {
    const Onnx__StringStringEntryProto *kv = t->external_data[i];
    const char *k = kv->key ? kv->key : "", *v = kv->value ? kv->value : "";
    if (!strcmp(k, "location")) {
      r->location = v;
    } else if (!strcmp(k, "offset")) {
      if (!parse_int64(v, &r->offset))
        return rc__fail(e, RC_ERR_FORMAT, "tensor '%s': external data offset '%s' is not a number",
                        name, v);
    } else if (!strcmp(k, "length")) {
      if (!parse_int64(v, &r->length))
        return rc__fail(e, RC_ERR_FORMAT, "tensor '%s': external data length '%s' is not a number",
                        name, v);
    }
    /* "checksum" and unknown keys carry nothing we need. */
  }
  if (!r->location || !*r->location)
    return rc__fail(e, RC_ERR_FORMAT, "tensor '%s': external data without a location", name);
  return RC_OK;
}

/* Resolve location against dir into a real path inside dir. */
static rc_status resolve_inside(const char *dir, const char *name, const char *location,
                                char **resolved, rc_err *e) {
  *resolved = NULL;
  if (location[0] == '/')
    return rc__fail(e, RC_ERR_FORMAT,
                    "tensor '%s': external data location '%s' is absolute; it must be relative to "
                    "the model's folder",
                    name, location);
  /* Refuse ".." components outright, even ones that would come back inside. */
  for (const char *p = location; *p;) {
    const char *end = strchr(p, '/');
    size_t n = end ? (size_t)(end - p) : strlen(p);
    if (n == 2 && p[0] == '.' && p[1] == '.')
      return rc__fail(e, RC_ERR_FORMAT,
                      "tensor '%s': external data location '%s' leaves the model's folder", name,
                      location);
    p += n;
    while (*p == '/') p++;
  }
  char *real_dir = realpath(dir, NULL);
  if (!real_dir)
    return rc__fail(e, RC_ERR_IO, "%s: cannot resolve folder: %s", dir, strerror(errno));
  size_t dl = strlen(dir), ll = strlen(location);
  char *joined = rc__malloc(dl + ll + 2);
  if (!joined) {
    free(real_dir);
    return rc__fail(e, RC_ERR_NOMEM, "tensor '%s': out of memory", name);
  }
  snprintf(joined, dl + ll + 2, "%s/%s", dir, location);
  char *real = realpath(joined, NULL);
  if (!real) {
    int err = errno;
    rc__fail(e, RC_ERR_IO, "tensor '%s': external data file %s: %s", name, joined, strerror(err));
    rc__free(joined);
    free(real_dir);
    return RC_ERR_IO;
  }
  rc__free(joined);
  size_t rdl = strlen(real_dir);
  int inside = !strncmp(real, real_dir, rdl) && (real[rdl] == '/' || (rdl == 1 && real_dir[0] == '/'));
  free(real_dir);
  if (!inside) {
    rc__fail(e, RC_ERR_FORMAT,
             "tensor '%s': external data location '%s' resolves to %s, outside the model's folder",
             name, location, real);
    free(real);
    return RC_ERR_FORMAT;
  }
  *resolved = rc__strdup(real);
  free(real);
  if (!*resolved) return rc__fail(e, RC_ERR_NOMEM, "tensor '%s': out of memory", name);
  return RC_OK;
}

rc_status rc__external_read(const char *dir, const char *name, const rc__external_ref *r,
                            size_t want, uint8_t **data, rc_err *e) {
  *data = NULL;
  char *path = NULL;
  RC_TRY(resolve_inside(dir, name, r->location, &path, e));
  rc_status st = RC_OK;
  int fd = open(path, O_RDONLY | O_CLOEXEC);
  struct stat sb;
  if (fd < 0 || fstat(fd, &sb) != 0) {
    st = rc__fail(e, RC_ERR_IO, "tensor '%s': external data file %s: %s", name, path,
                  strerror(errno));
    goto out;
  }
  if (!S_ISREG(sb.st_mode)) {
    st = rc__fail(e, RC_ERR_IO, "tensor '%s': external data %s is not a regular file", name, path);
    goto out;
  }
  int64_t size = (int64_t)sb.st_size;
  int64_t length = r->length >= 0 ? r->length : size - r->offset;
  if (r->offset > size || length < 0 || length > size - r->offset) {
    st = rc__fail(e, RC_ERR_FORMAT,
                  "tensor '%s': external data range offset %lld length %lld runs past the end of "
                  "%s (%lld bytes)",
                  name, (long long)r->offset, (long long)(r->length >= 0 ? r->length : -1), path,
                  (long long)size);
    goto out;
  }
  if ((uint64_t)length != (uint64_t)want) {
    st = rc__fail(e, RC_ERR_FORMAT,
                  "tensor '%s': external data holds %lld bytes but the shape needs %zu", name,
                  (long long)length, want);
    goto out;
  }
  uint8_t *buf = rc__malloc(want);
  if (!buf) {
    st = rc__fail(e, RC_ERR_NOMEM, "tensor '%s': out of memory for %zu bytes", name, want);
    goto out;
  }
  size_t got = 0;
  while (got < want) {
    ssize_t n = pread(fd, buf + got, want - got, (off_t)(r->offset + (int64_t)got));
    if (n < 0 && errno == EINTR) continue;
    if (n <= 0) {
      st = rc__fail(e, RC_ERR_IO, "tensor '%s': cannot read %s: %s", name, path,
                    n < 0 ? strerror(errno) : "file shrank while reading");
      rc__free(buf);
      goto out;
    }
    got += (size_t)n;
  }
  *data = buf;
out:
  if (fd >= 0) close(fd);
  rc__free(path);
  return st;
}
