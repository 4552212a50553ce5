/* Pieces shared by the data readers. */
#ifndef RC_DATA_INTERNAL_H
#define RC_DATA_INTERNAL_H

#include <stddef.h>
#include <stdint.h>

#include "core/status.h"
#include "recoup/data.h"

/* Room for a file's own header beyond the payload limit (npy headers are
 * capped at RC__NPY_MAX_HEADER, IDX headers are at most 36 bytes). */
#define RC__NPY_MAX_HEADER ((size_t)1 << 20)
#define RC__DATA_HEADER_SLACK (RC__NPY_MAX_HEADER + 4096)

/* Bytes to read. `heap` is the same block as p when p came from rc__malloc
 * and the reader may adopt it as the array's storage (saving a copy); a
 * reader that adopts it sets heap to NULL. */
typedef struct rc__src {
  const unsigned char *p;
  size_t n;
  unsigned char *heap;
  size_t max_bytes;
  int borrow; /* point the array at the payload in place (a file mapping) */
} rc__src;

/* Errors from these name what is wrong; the caller prefixes the file name. */
rc_status rc__npy_read(rc_array *out, rc__src *s, rc_err *e);
rc_status rc__idx_read(rc_array *out, rc__src *s, rc_err *e);
rc_status rc__npz_read(rc_array *out, const rc__src *s, const char *member, rc_err *e);
rc_status rc__npz_names(char ***names, int *count, const unsigned char *p, size_t n, rc_err *e);
/* Inflate a gzip stream (one or more members) into a new rc__malloc block of
 * at most limit bytes. */
rc_status rc__gunzip(unsigned char **out, size_t *out_n, const unsigned char *p, size_t n,
                     size_t limit, rc_err *e);

/* Make out own nbytes of payload at s->p + offset, converting elements of
 * elem_size bytes from the file's byte order (little-endian if file_le).
 * Adopts s->heap when set, else copies. */
rc_status rc__take_payload(rc_array *out, rc__src *s, size_t offset, size_t nbytes,
                           size_t elem_size, int file_le, rc_err *e);

/* Images (image_set.c): read, decode and prepare image i of s into dst,
 * (C, H, W) uint8, the message naming the file; and the checks a
 * preparation must pass before any image is read. */
struct rc_image_set;
struct rc_image_prep;
rc_status rc__image_read_one(uint8_t *dst, const struct rc_image_set *s, int64_t i, const struct rc_image_prep *p,
                             rc_err *e);
rc_status rc__image_prep_check(const struct rc_image_prep *p, rc_err *e);

/* Does s end with suffix (given in lower case), ignoring ASCII case? */
int rc__ends_with_ci(const char *s, const char *suffix);

/* Unaligned integer loads in a stated byte order. */
uint32_t rc__le32(const unsigned char *p);
uint16_t rc__le16(const unsigned char *p);
uint64_t rc__le64(const unsigned char *p);
uint32_t rc__be32(const unsigned char *p);

#endif
