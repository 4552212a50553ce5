/* Byte-level pieces every data reader uses: unaligned loads in a stated byte
 * order and taking over an array's payload. Kept apart from array.c, which
 * dispatches to the readers, so that the readers depend on this file and
 * array.c on them, never back. */
#include <stdint.h>
#include <string.h>

#include "core/alloc.h"
#include "data/data_internal.h"

uint16_t rc__le16(const unsigned char *p) { return (uint16_t)(p[0] | (p[1] << 8)); }
uint32_t rc__le32(const unsigned char *p) {
  return (uint32_t)p[0] | ((uint32_t)p[1] << 8) | ((uint32_t)p[2] << 16) | ((uint32_t)p[3] << 24);
}
uint64_t rc__le64(const unsigned char *p) { return rc__le32(p) | ((uint64_t)rc__le32(p + 4) << 32); }
uint32_t rc__be32(const unsigned char *p) {
  return ((uint32_t)p[0] << 24) | ((uint32_t)p[1] << 16) | ((uint32_t)p[2] << 8) | (uint32_t)p[3];
}

static int host_is_little_endian(void) {
  const uint16_t one = 1;
  unsigned char b;
  memcpy(&b, &one, 1);
  return b == 1;
}

static void swap_elements(unsigned char *p, size_t nbytes, size_t elem_size) {
  for (size_t off = 0; off + elem_size <= nbytes; off += elem_size)
    for (size_t i = 0, j = elem_size - 1; i < j; i++, j--) {
      unsigned char t = p[off + i];
      p[off + i] = p[off + j];
      p[off + j] = t;
    }
}

rc_status rc__take_payload(rc_array *out, rc__src *s, size_t offset, size_t nbytes,
                           size_t elem_size, int file_le, rc_err *e) {
  unsigned char *dst;
  if (s->borrow) {
    if (elem_size > 1 && ((file_le != 0) != host_is_little_endian() || offset % elem_size))
      return rc__fail(e, RC_ERR_UNSUPPORTED, "the data is not in the host's byte order or not aligned for mapping");
    out->t.data = (void *)(s->p + offset);
    return RC_OK;
  }
  if (s->heap) {
    /* Slide the payload to the start of the block: malloc alignment then
     * holds for every element type, whatever the header length was. */
    dst = s->heap;
    memmove(dst, dst + offset, nbytes);
    unsigned char *shrunk = nbytes < s->n ? rc__realloc(dst, nbytes) : NULL;
    if (shrunk) dst = shrunk;
    s->heap = NULL;
  } else {
    dst = rc__malloc(nbytes);
    if (!dst) return rc__fail(e, RC_ERR_NOMEM, "out of memory for %zu bytes of array data", nbytes);
    memcpy(dst, s->p + offset, nbytes);
  }
  if (elem_size > 1 && (file_le != 0) != host_is_little_endian()) swap_elements(dst, nbytes, elem_size);
  out->owned = dst;
  out->t.data = dst;
  return RC_OK;
}

int rc__ends_with_ci(const char *s, const char *suffix) {
  size_t a = strlen(s), b = strlen(suffix);
  if (b > a) return 0;
  for (size_t i = 0; i < b; i++) {
    char c = s[a - b + i];
    if (c >= 'A' && c <= 'Z') c = (char)(c - 'A' + 'a');
    if (c != suffix[i]) return 0;
  }
  return 1;
}
