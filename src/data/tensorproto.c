/* ONNX TensorProto data files: size limits and file handling here, the
 * message itself decoded by the IR layer's TensorProto codec, which the
 * model reader uses for initializers too. */
#include "data/tensorproto.h"

#include <stdint.h>
#include <string.h>

#include "core/alloc.h"
#include "core/file.h"
#include "ir/tensor_proto.h"

/* Typed fields may take up to 10 bytes per element (negative varints). */
static size_t tensorproto_max_file(size_t max_bytes) {
  return max_bytes > (SIZE_MAX - ((size_t)1 << 20)) / 10 ? SIZE_MAX
                                                         : max_bytes * 10 + ((size_t)1 << 20);
}

rc_status rc__tensorproto_file_read(const char *path, rc_tensor *out, void **owned, size_t max_bytes,
                                    rc_err *e) {
  *owned = NULL;
  memset(out, 0, sizeof *out);
  uint8_t *buf;
  size_t n;
  RC_TRY(rc__file_read_all(path, tensorproto_max_file(max_bytes), &buf, &n, e));
  char *dir = rc__path_dir(path);
  if (!dir) {
    rc__free(buf);
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", path);
  }
  rc_status st = rc__tensorproto_decode_bytes(buf, n, path, dir, out, owned, max_bytes, e);
  rc__free(buf);
  rc__free(dir);
  return st;
}

rc_status rc__tensorproto_mem_read(const void *buf, size_t n, const char *name, rc_tensor *out,
                                   void **owned, size_t max_bytes, rc_err *e) {
  *owned = NULL;
  memset(out, 0, sizeof *out);
  if (!name || !*name) name = "(memory)";
  if (n > tensorproto_max_file(max_bytes))
    return rc__fail(e, RC_ERR_LIMIT, "%s: %zu bytes are over the limit of %zu", name, n,
                    tensorproto_max_file(max_bytes));
  return rc__tensorproto_decode_bytes(buf, n, name, NULL, out, owned, max_bytes, e);
}
