/* .npz: a zip archive of .npy members (PKWARE APPNOTE layout). The central
 * directory is the authority for names, sizes and CRCs; local headers are
 * only used to find where a member's data starts (NumPy writes zip64 local
 * headers with placeholder sizes). Members are stored (method 0) or deflated
 * (method 8, raw deflate through zlib). */
#include <stdio.h>
#include <string.h>
#include <zlib.h>

#include "core/alloc.h"
#include "data/data_internal.h"

#define SIG_LOCAL 0x04034b50u
#define SIG_CENTRAL 0x02014b50u
#define SIG_EOCD 0x06054b50u
#define SIG_ZIP64_LOCATOR 0x07064b50u
#define SIG_ZIP64_EOCD 0x06064b50u
#define EOCD_LEN 22u
#define CENTRAL_LEN 46u
#define LOCAL_LEN 30u

typedef struct zip_dir {
  const unsigned char *p; /* whole archive */
  size_t n;
  size_t cd_off, cd_end;  /* central directory range */
  uint64_t count;
} zip_dir;

typedef struct zip_entry {
  const char *name;
  size_t name_len;
  unsigned flags, method;
  uint32_t crc;
  uint64_t csize, usize, local_off;
  size_t next; /* offset of the following central entry */
} zip_entry;

static rc_status find_zip64_end(zip_dir *z, size_t eocd, rc_err *e) {
  if (eocd < 20 || rc__le32(z->p + eocd - 20) != SIG_ZIP64_LOCATOR)
    return rc__fail(e, RC_ERR_FORMAT, "zip: end record asks for zip64 but the zip64 locator is missing");
  uint64_t off = rc__le64(z->p + eocd - 20 + 8);
  if (off > z->n || z->n - off < 56 || rc__le32(z->p + off) != SIG_ZIP64_EOCD)
    return rc__fail(e, RC_ERR_FORMAT, "zip: zip64 end record missing or out of range");
  const unsigned char *r = z->p + off;
  if (rc__le32(r + 16) != 0 || rc__le32(r + 20) != 0)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "zip: multi-volume archives are not supported");
  uint64_t count = rc__le64(r + 32), size = rc__le64(r + 40), start = rc__le64(r + 48);
  if (start > z->n || size > z->n - start)
    return rc__fail(e, RC_ERR_FORMAT, "zip: central directory (%llu bytes at %llu) runs past the end of the file",
                    (unsigned long long)size, (unsigned long long)start);
  z->count = count;
  z->cd_off = (size_t)start;
  z->cd_end = (size_t)(start + size);
  return RC_OK;
}

static rc_status open_dir(zip_dir *z, const unsigned char *p, size_t n, rc_err *e) {
  z->p = p;
  z->n = n;
  if (n < EOCD_LEN) return rc__fail(e, RC_ERR_FORMAT, "zip: truncated (%zu bytes, no end record)", n);
  /* The end record sits in the last 22 + 65535 (comment) bytes; take the
   * last signature whose comment length reaches exactly to the end. */
  size_t lowest = n - EOCD_LEN > 65535 ? n - EOCD_LEN - 65535 : 0;
  size_t eocd = SIZE_MAX;
  for (size_t i = n - EOCD_LEN + 1; i-- > lowest;) {
    if (rc__le32(p + i) == SIG_EOCD && i + EOCD_LEN + rc__le16(p + i + 20) == n) {
      eocd = i;
      break;
    }
  }
  if (eocd == SIZE_MAX)
    return rc__fail(e, RC_ERR_FORMAT, "zip: no end-of-central-directory record (truncated or not a zip archive)");
  const unsigned char *r = p + eocd;
  if (rc__le16(r + 4) != 0 || rc__le16(r + 6) != 0)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "zip: multi-volume archives are not supported");
  uint32_t count = rc__le16(r + 10), size = rc__le32(r + 12), start = rc__le32(r + 16);
  if (count == 0xFFFFu || size == 0xFFFFFFFFu || start == 0xFFFFFFFFu) return find_zip64_end(z, eocd, e);
  if (start > eocd || size > eocd - start)
    return rc__fail(e, RC_ERR_FORMAT, "zip: central directory (%u bytes at %u) runs past its end record", size, start);
  z->count = count;
  z->cd_off = start;
  z->cd_end = (size_t)start + size;
  return RC_OK;
}

/* Fill fields flagged 0xFFFFFFFF from the zip64 extra field (id 1), which
 * lists, in this order, only the values that overflowed. */
static rc_status apply_zip64_extra(zip_entry *en, const unsigned char *x, size_t len, rc_err *e) {
  int need_u = en->usize == 0xFFFFFFFFu, need_c = en->csize == 0xFFFFFFFFu, need_o = en->local_off == 0xFFFFFFFFu;
  if (!need_u && !need_c && !need_o) return RC_OK;
  size_t i = 0;
  while (i + 4 <= len) {
    unsigned id = rc__le16(x + i), sz = rc__le16(x + i + 2);
    if (sz > len - i - 4) break;
    if (id == 1) {
      const unsigned char *f = x + i + 4;
      size_t k = 0;
      if (need_u) { if (k + 8 > sz) break; en->usize = rc__le64(f + k); k += 8; need_u = 0; }
      if (need_c) { if (k + 8 > sz) break; en->csize = rc__le64(f + k); k += 8; need_c = 0; }
      if (need_o) { if (k + 8 > sz) break; en->local_off = rc__le64(f + k); need_o = 0; }
      return RC_OK;
    }
    i += 4 + (size_t)sz;
  }
  return rc__fail(e, RC_ERR_FORMAT, "zip: member '%.*s' needs a zip64 extra field that is missing or short",
                  (int)(en->name_len > 200 ? 200 : en->name_len), en->name);
}

/* Parse the central entry at offset `at`. */
static rc_status read_entry(zip_entry *en, const zip_dir *z, size_t at, rc_err *e) {
  if (at > z->cd_end || z->cd_end - at < CENTRAL_LEN || rc__le32(z->p + at) != SIG_CENTRAL)
    return rc__fail(e, RC_ERR_FORMAT, "zip: central directory entry at offset %zu is damaged", at);
  const unsigned char *r = z->p + at;
  size_t nlen = rc__le16(r + 28), xlen = rc__le16(r + 30), clen = rc__le16(r + 32);
  if (nlen + xlen + clen > z->cd_end - at - CENTRAL_LEN)
    return rc__fail(e, RC_ERR_FORMAT, "zip: central directory entry at offset %zu runs past the directory", at);
  en->flags = rc__le16(r + 8);
  en->method = rc__le16(r + 10);
  en->crc = rc__le32(r + 16);
  en->csize = rc__le32(r + 20);
  en->usize = rc__le32(r + 24);
  en->local_off = rc__le32(r + 42);
  en->name = (const char *)r + CENTRAL_LEN;
  en->name_len = nlen;
  en->next = at + CENTRAL_LEN + nlen + xlen + clen;
  return apply_zip64_extra(en, r + CENTRAL_LEN + nlen, xlen, e);
}

/* Walk the directory: calls visit(entry, user) for each; stops early when
 * visit returns nonzero. */
static rc_status walk(const zip_dir *z, int (*visit)(const zip_entry *, void *), void *user, rc_err *e) {
  size_t at = z->cd_off;
  for (uint64_t i = 0; i < z->count; i++) {
    zip_entry en;
    RC_TRY(read_entry(&en, z, at, e));
    if (visit(&en, user)) return RC_OK;
    at = en.next;
  }
  return RC_OK;
}

typedef struct name_count {
  int count;
  size_t bytes;
} name_count;

static int count_names(const zip_entry *en, void *user) {
  name_count *c = user;
  c->count++;
  c->bytes += en->name_len + 1;
  return 0;
}

typedef struct name_fill {
  char **names;
  char *next;
  int i;
} name_fill;

static int fill_names(const zip_entry *en, void *user) {
  name_fill *f = user;
  memcpy(f->next, en->name, en->name_len);
  f->next[en->name_len] = '\0';
  f->names[f->i++] = f->next;
  f->next += en->name_len + 1;
  return 0;
}

rc_status rc__npz_names(char ***names, int *count, const unsigned char *p, size_t n, rc_err *e) {
  zip_dir z;
  RC_TRY(open_dir(&z, p, n, e));
  /* Each entry takes at least 46 bytes of directory: bounds the count. */
  if (z.count > (z.cd_end - z.cd_off) / CENTRAL_LEN || z.count > 1000000)
    return rc__fail(e, RC_ERR_FORMAT, "zip: %llu entries cannot fit a %zu-byte central directory",
                    (unsigned long long)z.count, z.cd_end - z.cd_off);
  name_count c = {0, 0};
  RC_TRY(walk(&z, count_names, &c, e));
  size_t ptr_bytes = ((size_t)c.count + 1) * sizeof(char *);
  char **block = rc__malloc(ptr_bytes + c.bytes);
  if (!block) return rc__fail(e, RC_ERR_NOMEM, "out of memory listing %d zip members", c.count);
  name_fill f = {block, (char *)block + ptr_bytes, 0};
  rc_status st = walk(&z, fill_names, &f, e);
  if (st != RC_OK) {
    rc__free(block);
    return st;
  }
  block[c.count] = NULL;
  *names = block;
  *count = c.count;
  return RC_OK;
}

typedef struct member_pick {
  const char *want; /* NULL: the first member */
  zip_entry found;
  int ok;
} member_pick;

static int name_matches(const zip_entry *en, const char *want) {
  size_t w = strlen(want);
  if (en->name_len == w && !memcmp(en->name, want, w)) return 1;
  return en->name_len == w + 4 && !memcmp(en->name, want, w) && !memcmp(en->name + w, ".npy", 4);
}

static int pick_member(const zip_entry *en, void *user) {
  member_pick *m = user;
  if (m->want && !name_matches(en, m->want)) return 0;
  m->found = *en;
  m->ok = 1;
  return 1;
}

static rc_status member_not_found(const zip_dir *z, const char *want, rc_err *e) {
  char list[256] = "";
  size_t used = 0;
  size_t at = z->cd_off;
  for (uint64_t i = 0; i < z->count && used + 1 < sizeof list; i++) {
    zip_entry en;
    if (read_entry(&en, z, at, NULL) != RC_OK) break;
    int k = snprintf(list + used, sizeof list - used, "%s'%.*s'", i ? ", " : "",
                     (int)(en.name_len > 64 ? 64 : en.name_len), en.name);
    if (k < 0) break;
    used += (size_t)k;
    at = en.next;
  }
  if (!want) return rc__fail(e, RC_ERR_FORMAT, "zip archive has no members");
  return rc__fail(e, RC_ERR_INVALID, "no member '%s' (members: %s)", want, z->count ? list : "none");
}

/* Inflate raw deflate data into exactly usize bytes. */
static rc_status inflate_exact(unsigned char *dst, uint64_t usize, const unsigned char *src, uint64_t csize,
                               rc_err *e) {
  z_stream zs;
  memset(&zs, 0, sizeof zs);
  if (inflateInit2(&zs, -MAX_WBITS) != Z_OK) return rc__fail(e, RC_ERR_NOMEM, "zlib: cannot start inflate");
  uint64_t in_left = csize, out_left = usize;
  zs.next_in = (unsigned char *)src;
  zs.next_out = dst;
  int zr = Z_OK;
  unsigned char spare; /* one byte of room to notice data past usize */
  int in_spare = 0;
  for (;;) {
    if (zs.avail_in == 0) {
      uInt k = in_left > (uint64_t)UINT32_MAX ? UINT32_MAX : (uInt)in_left;
      zs.avail_in = k;
      in_left -= k;
    }
    if (zs.avail_out == 0) {
      if (out_left == 0) {
        if (in_spare) break;
        zs.next_out = &spare;
        zs.avail_out = 1;
        in_spare = 1;
      } else {
        uInt k = out_left > (uint64_t)UINT32_MAX ? UINT32_MAX : (uInt)out_left;
        zs.avail_out = k;
        out_left -= k;
      }
    }
    zr = inflate(&zs, Z_NO_FLUSH);
    if (zr == Z_STREAM_END) break;
    if (zr == Z_BUF_ERROR && zs.avail_in == 0 && in_left == 0) break;
    if (zr != Z_OK && zr != Z_BUF_ERROR) break;
  }
  uint64_t produced = (uint64_t)zs.total_out;
  inflateEnd(&zs);
  if (in_spare && zs.avail_out == 0)
    return rc__fail(e, RC_ERR_FORMAT, "deflated data is longer than the %llu bytes the directory states",
                    (unsigned long long)usize);
  if (zr == Z_DATA_ERROR || zr == Z_NEED_DICT || zr == Z_STREAM_ERROR)
    return rc__fail(e, RC_ERR_FORMAT, "deflated data is corrupt (zlib: %s)", zs.msg ? zs.msg : "data error");
  if (zr == Z_MEM_ERROR) return rc__fail(e, RC_ERR_NOMEM, "zlib: out of memory");
  if (zr != Z_STREAM_END || produced != usize)
    return rc__fail(e, RC_ERR_FORMAT, "deflated data is truncated: %llu of %llu bytes",
                    (unsigned long long)produced, (unsigned long long)usize);
  return RC_OK;
}

static uint32_t crc_of(const unsigned char *p, uint64_t n) {
  uLong c = crc32(0L, Z_NULL, 0);
  while (n > 0) {
    uInt k = n > (1u << 30) ? (1u << 30) : (uInt)n;
    c = crc32(c, p, k);
    p += k;
    n -= k;
  }
  return (uint32_t)c;
}

static rc_status check_crc(const unsigned char *p, uint64_t n, uint32_t want, rc_err *e) {
  uint32_t crc = crc_of(p, n);
  if (crc != want)
    return rc__fail(e, RC_ERR_FORMAT, "CRC-32 mismatch (directory 0x%08x, data 0x%08x): the file is damaged", want,
                    crc);
  return RC_OK;
}

static rc_status read_member(rc_array *out, const zip_dir *z, const zip_entry *en, size_t max_bytes, rc_err *e) {
  if (en->flags & 1u) return rc__fail(e, RC_ERR_UNSUPPORTED, "member is encrypted");
  if (en->method != 0 && en->method != 8)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "compression method %u (stored 0 and deflated 8 are read)", en->method);
  size_t limit = max_bytes > SIZE_MAX - RC__DATA_HEADER_SLACK ? SIZE_MAX : max_bytes + RC__DATA_HEADER_SLACK;
  if (en->usize > limit)
    return rc__fail(e, RC_ERR_LIMIT, "member holds %llu bytes, over the limit of %zu",
                    (unsigned long long)en->usize, limit);
  uint64_t lo = en->local_off;
  if (lo > z->n || z->n - lo < LOCAL_LEN || rc__le32(z->p + lo) != SIG_LOCAL)
    return rc__fail(e, RC_ERR_FORMAT, "local header at offset %llu missing or damaged", (unsigned long long)lo);
  uint64_t data = lo + LOCAL_LEN + rc__le16(z->p + lo + 26) + rc__le16(z->p + lo + 28);
  if (data > z->n || en->csize > z->n - data)
    return rc__fail(e, RC_ERR_FORMAT, "truncated: member data (%llu bytes at offset %llu) runs past the end of the %zu-byte file",
                    (unsigned long long)en->csize, (unsigned long long)data, z->n);
  const unsigned char *src = z->p + data;
  if (en->method == 0) {
    if (en->csize != en->usize)
      return rc__fail(e, RC_ERR_FORMAT, "stored member sizes disagree (%llu compressed, %llu uncompressed)",
                      (unsigned long long)en->csize, (unsigned long long)en->usize);
    RC_TRY(check_crc(src, en->usize, en->crc, e));
    rc__src s = {src, (size_t)en->usize, NULL, max_bytes, 0};
    return rc__npy_read(out, &s, e);
  }
  unsigned char *buf = rc__malloc((size_t)en->usize);
  if (!buf) return rc__fail(e, RC_ERR_NOMEM, "out of memory for %llu bytes", (unsigned long long)en->usize);
  rc_status st = inflate_exact(buf, en->usize, src, en->csize, e);
  if (st == RC_OK) st = check_crc(buf, en->usize, en->crc, e);
  rc__src s = {buf, (size_t)en->usize, buf, max_bytes, 0};
  if (st == RC_OK) st = rc__npy_read(out, &s, e);
  rc__free(s.heap); /* NULL once adopted */
  return st;
}

rc_status rc__npz_read(rc_array *out, const rc__src *s, const char *member, rc_err *e) {
  zip_dir z;
  RC_TRY(open_dir(&z, s->p, s->n, e));
  if (z.count > (z.cd_end - z.cd_off) / CENTRAL_LEN)
    return rc__fail(e, RC_ERR_FORMAT, "zip: %llu entries cannot fit a %zu-byte central directory",
                    (unsigned long long)z.count, z.cd_end - z.cd_off);
  member_pick m = {member, {0}, 0};
  RC_TRY(walk(&z, pick_member, &m, e));
  if (!m.ok) return member_not_found(&z, member, e);
  rc_status st = read_member(out, &z, &m.found, s->max_bytes, e);
  if (st != RC_OK && e)
    rc__wrap(e, "member '%.*s'", (int)(m.found.name_len > 128 ? 128 : m.found.name_len), m.found.name);
  return st;
}
