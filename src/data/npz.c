/* .npz: a zip archive of .npy members, read through libzip (Debian's
 * libzip-dev) from memory. libzip parses the directory (zip64 included) and
 * inflates; recoup keeps the checks a hostile file needs: a member's size is
 * compared with the limit before anything is allocated, exactly that many
 * bytes are read (a stream that yields more or fewer is refused), and the
 * CRC-32 is checked at the end of every member. */
#include <stdio.h>
#include <string.h>
#include <zip.h>

#include "core/alloc.h"
#include "data/data_internal.h"

/* More entries than any array bundle has: bounds listing memory. */
#define MAX_MEMBERS 1000000

static rc_status zip_fail(rc_err *e, int code) {
  if (code == ZIP_ER_MEMORY) return rc__fail(e, RC_ERR_NOMEM, "zip: out of memory");
  if (code == ZIP_ER_MULTIDISK) return rc__fail(e, RC_ERR_UNSUPPORTED, "zip: multi-volume archives are not supported");
  if (code == ZIP_ER_NOZIP)
    return rc__fail(e, RC_ERR_FORMAT, "zip: no end-of-central-directory record (truncated or not a zip archive)");
  if (code == ZIP_ER_INCONS)
    return rc__fail(e, RC_ERR_FORMAT, "zip: directory records disagree or run past the file (damaged or truncated)");
  if (code == ZIP_ER_CRC) return rc__fail(e, RC_ERR_FORMAT, "CRC-32 mismatch: the file is damaged");
  zip_error_t ze;
  zip_error_init_with_code(&ze, code);
  rc_status r = rc__fail(e, RC_ERR_FORMAT, "zip: %s", zip_error_strerror(&ze));
  zip_error_fini(&ze);
  return r;
}

/* Open the archive held in p[0..n) (not copied; it must outlive *za). */
static rc_status open_mem(zip_t **za, const unsigned char *p, size_t n, rc_err *e) {
  zip_error_t ze;
  zip_error_init(&ze);
  zip_source_t *src = zip_source_buffer_create(n ? (const void *)p : (const void *)"", n, 0, &ze);
  if (!src) {
    rc_status st = zip_fail(e, zip_error_code_zip(&ze));
    zip_error_fini(&ze);
    return st;
  }
  *za = zip_open_from_source(src, ZIP_RDONLY, &ze);
  if (!*za) {
    zip_source_free(src);
    rc_status st = zip_fail(e, zip_error_code_zip(&ze));
    zip_error_fini(&ze);
    return st;
  }
  zip_error_fini(&ze);
  zip_int64_t count = zip_get_num_entries(*za, 0);
  if (count < 0 || count > MAX_MEMBERS) {
    zip_discard(*za);
    return rc__fail(e, RC_ERR_FORMAT, "zip: %lld entries (at most %d are read)", (long long)count, MAX_MEMBERS);
  }
  return RC_OK;
}

rc_status rc__npz_names(char ***names, int *count, const unsigned char *p, size_t n, rc_err *e) {
  zip_t *za;
  RC_TRY(open_mem(&za, p, n, e));
  int c = (int)zip_get_num_entries(za, 0);
  size_t bytes = ((size_t)c + 1) * sizeof(char *);
  for (int i = 0; i < c; i++) {
    const char *nm = zip_get_name(za, (zip_uint64_t)i, ZIP_FL_ENC_RAW);
    bytes += (nm ? strlen(nm) : 0) + 1;
  }
  char **block = rc__malloc(bytes);
  if (!block) {
    zip_discard(za);
    return rc__fail(e, RC_ERR_NOMEM, "out of memory listing %d zip members", c);
  }
  char *next = (char *)(block + c + 1);
  for (int i = 0; i < c; i++) {
    const char *nm = zip_get_name(za, (zip_uint64_t)i, ZIP_FL_ENC_RAW);
    size_t len = nm ? strlen(nm) : 0;
    memcpy(next, nm ? nm : "", len + 1);
    block[i] = next;
    next += len + 1;
  }
  block[c] = NULL;
  zip_discard(za);
  *names = block;
  *count = c;
  return RC_OK;
}

/* "x" matches "x" or "x.npy"; NULL matches the first member. */
static zip_int64_t find_member(zip_t *za, const char *want) {
  if (!want) return zip_get_num_entries(za, 0) > 0 ? 0 : -1;
  zip_int64_t i = zip_name_locate(za, want, ZIP_FL_ENC_RAW);
  if (i >= 0) return i;
  char full[1024];
  if (snprintf(full, sizeof full, "%s.npy", want) >= (int)sizeof full) return -1;
  return zip_name_locate(za, full, ZIP_FL_ENC_RAW);
}

static rc_status member_not_found(zip_t *za, const char *want, rc_err *e) {
  if (!want) return rc__fail(e, RC_ERR_FORMAT, "zip archive has no members");
  char list[256] = "";
  size_t used = 0;
  zip_int64_t c = zip_get_num_entries(za, 0);
  for (zip_int64_t i = 0; i < c && used + 1 < sizeof list; i++) {
    const char *nm = zip_get_name(za, (zip_uint64_t)i, ZIP_FL_ENC_RAW);
    int k = snprintf(list + used, sizeof list - used, "%s'%.64s'", i ? ", " : "", nm ? nm : "");
    if (k < 0) break;
    used += (size_t)k;
  }
  return rc__fail(e, RC_ERR_INVALID, "no member '%s' (members: %s)", want, c ? list : "none");
}

/* Read exactly st->size bytes into a new block, then one more read that must
 * report the end (where libzip checks the CRC-32). */
static rc_status read_exact(zip_t *za, zip_uint64_t index, const zip_stat_t *st, unsigned char **out,
                            rc_err *e) {
  *out = NULL;
  zip_file_t *f = zip_fopen_index(za, index, 0);
  if (!f) return zip_fail(e, zip_error_code_zip(zip_get_error(za)));
  unsigned char *buf = rc__malloc((size_t)st->size + 1);
  if (!buf) {
    zip_fclose(f);
    return rc__fail(e, RC_ERR_NOMEM, "out of memory for %llu bytes", (unsigned long long)st->size);
  }
  zip_uint64_t got = 0;
  zip_int64_t k = 1;
  while (got < st->size && (k = zip_fread(f, buf + got, st->size - got)) > 0) got += (zip_uint64_t)k;
  unsigned char spare;
  zip_int64_t more = k > 0 ? zip_fread(f, &spare, 1) : 0;
  rc_status s = RC_OK;
  if (k < 0 || more < 0) {
    int code = zip_error_code_zip(zip_file_get_error(f));
    s = code == ZIP_ER_INCONS && got == st->size
            ? rc__fail(e, RC_ERR_FORMAT, "member data is longer than the %llu bytes the directory states",
                       (unsigned long long)st->size)
            : zip_fail(e, code);
  } else if (got < st->size)
    s = rc__fail(e, RC_ERR_FORMAT, "member data is truncated: %llu of %llu bytes", (unsigned long long)got,
                 (unsigned long long)st->size);
  else if (more > 0)
    s = rc__fail(e, RC_ERR_FORMAT, "member data is longer than the %llu bytes the directory states",
                 (unsigned long long)st->size);
  zip_fclose(f);
  if (s != RC_OK) {
    rc__free(buf);
    return s;
  }
  *out = buf;
  return RC_OK;
}

static rc_status read_member(rc_array *out, zip_t *za, zip_uint64_t index, size_t max_bytes, rc_err *e) {
  zip_stat_t st;
  zip_stat_init(&st);
  if (zip_stat_index(za, index, 0, &st) != 0) return zip_fail(e, zip_error_code_zip(zip_get_error(za)));
  if ((st.valid & ZIP_STAT_ENCRYPTION_METHOD) && st.encryption_method != ZIP_EM_NONE)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "member is encrypted");
  if ((st.valid & ZIP_STAT_COMP_METHOD) && st.comp_method != ZIP_CM_STORE && st.comp_method != ZIP_CM_DEFLATE)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "compression method %u (stored 0 and deflated 8 are read)",
                    (unsigned)st.comp_method);
  if (!(st.valid & ZIP_STAT_SIZE)) return rc__fail(e, RC_ERR_FORMAT, "member size unknown");
  size_t limit = max_bytes > SIZE_MAX - RC__DATA_HEADER_SLACK ? SIZE_MAX : max_bytes + RC__DATA_HEADER_SLACK;
  if (st.size > limit)
    return rc__fail(e, RC_ERR_LIMIT, "member holds %llu bytes, over the limit of %zu", (unsigned long long)st.size,
                    limit);
  unsigned char *buf;
  RC_TRY(read_exact(za, index, &st, &buf, e));
  rc__src s = {buf, (size_t)st.size, buf, max_bytes, 0};
  rc_status r = rc__npy_read(out, &s, e);
  rc__free(s.heap); /* NULL once adopted */
  return r;
}

rc_status rc__npz_read(rc_array *out, const rc__src *s, const char *member, rc_err *e) {
  zip_t *za;
  RC_TRY(open_mem(&za, s->p, s->n, e));
  zip_int64_t i = find_member(za, member);
  rc_status st = i < 0 ? member_not_found(za, member, e) : read_member(out, za, (zip_uint64_t)i, s->max_bytes, e);
  if (st != RC_OK && i >= 0 && e) {
    const char *nm = zip_get_name(za, (zip_uint64_t)i, ZIP_FL_ENC_RAW);
    rc__wrap(e, "member '%.128s'", nm ? nm : "");
  }
  zip_discard(za);
  return st;
}
