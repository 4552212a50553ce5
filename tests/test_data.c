/* Data module: .npy/.npz/IDX readers on fixtures written here per the
 * published formats, corrupt and hostile files, conversion to model input,
 * labels, the PCG32 generator, batching and splits, and the real
 * Fashion-MNIST test files when Debian's dataset-fashion-mnist is installed.
 *
 * Sources of the facts checked:
 *  - .npy layout: the NumPy format spec (numpy.lib.format): magic "\x93NUMPY",
 *    version bytes, little-endian header length (2 bytes in 1.0, 4 in 2.0/3.0),
 *    dict literal with descr/fortran_order/shape, padding to 64 bytes, '\n'.
 *  - zip layout: PKWARE's APPNOTE (local header, central directory, end
 *    record, zip64 extra field id 1, zip64 end record and locator).
 *  - IDX layout: the MNIST database's published file-format description
 *    (magic 0 0 type ndim, big-endian uint32 dims, type codes 08..0E).
 *  - IEEE 754 binary16 bit patterns (0x3c00 = 1.0, 0xc000 = -2.0).
 *  - PCG32 output: the reference implementation's demo (pcg32-demo, seed 42,
 *    sequence 54), values recalled from memory.
 *  - Fashion-MNIST: the dataset's description (t10k set: 10000 images of
 *    28x28 uint8, labels 0..9; 1000 images per class, from memory). */
#define _POSIX_C_SOURCE 200809L

#include <stdint.h>
#include <stdlib.h>
#include <unistd.h>
#include <zlib.h>

#include "core/alloc.h"
#include "core/rng.h"
#include "recoup/alloc.h"
#include "recoup/data.h"
#include "test.h"

static char tmpdir[512];

/* ---- fixture writers ---------------------------------------------------- */

typedef struct buf {
  unsigned char *p;
  size_t n, cap;
} buf;

static void put(buf *b, const void *data, size_t n) {
  if (b->n + n > b->cap) {
    size_t cap = b->cap ? b->cap : 256;
    while (cap < b->n + n) cap *= 2;
    b->p = realloc(b->p, cap);
    if (!b->p) abort();
    b->cap = cap;
  }
  if (n) memcpy(b->p + b->n, data, n);
  b->n += n;
}

static void put_le(buf *b, uint64_t v, int bytes) {
  unsigned char t[8];
  for (int i = 0; i < bytes; i++) t[i] = (unsigned char)(v >> (8 * i));
  put(b, t, (size_t)bytes);
}

static void put_be32(buf *b, uint32_t v) {
  unsigned char t[4] = {(unsigned char)(v >> 24), (unsigned char)(v >> 16), (unsigned char)(v >> 8),
                        (unsigned char)v};
  put(b, t, 4);
}

/* An .npy image per the format spec: the header dict text `dict` is padded
 * with spaces so that preamble + header is a multiple of 64, then '\n'. */
static buf npy_image(int version, const char *dict, const void *data, size_t n) {
  buf b = {0};
  size_t pre = version == 1 ? 10 : 12;
  size_t hlen = strlen(dict) + 1;
  size_t total = (pre + hlen + 63) / 64 * 64;
  hlen = total - pre;
  put(&b, "\x93NUMPY", 6);
  unsigned char v[2] = {(unsigned char)version, 0};
  put(&b, v, 2);
  put_le(&b, hlen, version == 1 ? 2 : 4);
  put(&b, dict, strlen(dict));
  for (size_t i = strlen(dict); i + 1 < hlen; i++) put(&b, " ", 1);
  put(&b, "\n", 1);
  put(&b, data, n);
  return b;
}

static void write_file(const char *path, const void *p, size_t n) {
  FILE *f = fopen(path, "wb");
  if (!f) {
    perror(path);
    abort();
  }
  if (n && fwrite(p, 1, n, f) != n) abort();
  fclose(f);
}

static const char *tmp_path(const char *name) {
  static char paths[8][640];
  static int next;
  char *p = paths[next++ % 8];
  snprintf(p, sizeof paths[0], "%s/%s", tmpdir, name);
  return p;
}

static buf deflate_raw(const void *p, size_t n, int gzip) {
  z_stream z;
  memset(&z, 0, sizeof z);
  if (deflateInit2(&z, 6, Z_DEFLATED, gzip ? 31 : -15, 8, Z_DEFAULT_STRATEGY) != Z_OK) abort();
  buf b = {0};
  b.cap = deflateBound(&z, (uLong)n) + 64;
  b.p = malloc(b.cap);
  z.next_in = (unsigned char *)p;
  z.avail_in = (uInt)n;
  z.next_out = b.p;
  z.avail_out = (uInt)b.cap;
  if (deflate(&z, Z_FINISH) != Z_STREAM_END) abort();
  b.n = z.total_out;
  deflateEnd(&z);
  return b;
}

typedef struct zmember {
  const char *name;
  const unsigned char *data;
  size_t n;
  int deflated;
} zmember;

/* The fields local and central headers share, from "version needed" to the
 * name length; zip64 moves the sizes into the extra field. */
static void put_zip_common(buf *b, int zip64, int deflated, uint32_t crc, size_t csize, size_t usize,
                           size_t nlen) {
  put_le(b, zip64 ? 45 : 20, 2);
  put_le(b, 0, 2);                /* flags */
  put_le(b, deflated ? 8 : 0, 2); /* method */
  put_le(b, 0, 2);                /* time */
  put_le(b, 0x21, 2);             /* date: 1980-01-01 */
  put_le(b, crc, 4);
  put_le(b, zip64 ? 0xFFFFFFFFu : csize, 4);
  put_le(b, zip64 ? 0xFFFFFFFFu : usize, 4);
  put_le(b, nlen, 2);
}

/* A zip archive per APPNOTE. zip64: sizes and offsets in the central
 * directory go through zip64 extra fields and the end record through the
 * zip64 end record, as writers do for large members. */
static buf make_zip(const zmember *m, int count, int zip64) {
  buf out = {0}, cd = {0};
  for (int i = 0; i < count; i++) {
    buf packed = {0};
    if (m[i].deflated) packed = deflate_raw(m[i].data, m[i].n, 0);
    const unsigned char *body = m[i].deflated ? packed.p : m[i].data;
    size_t csize = m[i].deflated ? packed.n : m[i].n;
    uint32_t crc = (uint32_t)crc32(0L, m[i].data, (uInt)m[i].n);
    size_t off = out.n, nlen = strlen(m[i].name);
    put_le(&out, 0x04034b50u, 4);
    put_zip_common(&out, zip64, m[i].deflated, crc, csize, m[i].n, nlen);
    put_le(&out, zip64 ? 20 : 0, 2);
    put(&out, m[i].name, nlen);
    if (zip64) {
      put_le(&out, 1, 2);
      put_le(&out, 16, 2);
      put_le(&out, m[i].n, 8);
      put_le(&out, csize, 8);
    }
    put(&out, body, csize);
    put_le(&cd, 0x02014b50u, 4);
    put_le(&cd, 20, 2); /* version made by */
    put_zip_common(&cd, zip64, m[i].deflated, crc, csize, m[i].n, nlen);
    put_le(&cd, zip64 ? 28 : 0, 2);
    put_le(&cd, 0, 2);
    put_le(&cd, 0, 2);
    put_le(&cd, 0, 2);
    put_le(&cd, 0, 4);
    put_le(&cd, zip64 ? 0xFFFFFFFFu : off, 4);
    put(&cd, m[i].name, nlen);
    if (zip64) {
      put_le(&cd, 1, 2);
      put_le(&cd, 24, 2);
      put_le(&cd, m[i].n, 8);
      put_le(&cd, csize, 8);
      put_le(&cd, off, 8);
    }
    free(packed.p);
  }
  size_t cd_off = out.n;
  put(&out, cd.p, cd.n);
  if (zip64) {
    size_t rec = out.n;
    put_le(&out, 0x06064b50u, 4);
    put_le(&out, 44, 8);
    put_le(&out, 45, 2);
    put_le(&out, 45, 2);
    put_le(&out, 0, 4);
    put_le(&out, 0, 4);
    put_le(&out, (uint64_t)count, 8);
    put_le(&out, (uint64_t)count, 8);
    put_le(&out, cd.n, 8);
    put_le(&out, cd_off, 8);
    put_le(&out, 0x07064b50u, 4);
    put_le(&out, 0, 4);
    put_le(&out, rec, 8);
    put_le(&out, 1, 4);
  }
  put_le(&out, 0x06054b50u, 4);
  put_le(&out, 0, 2);
  put_le(&out, 0, 2);
  put_le(&out, zip64 ? 0xFFFF : (unsigned)count, 2);
  put_le(&out, zip64 ? 0xFFFF : (unsigned)count, 2);
  put_le(&out, zip64 ? 0xFFFFFFFFu : cd.n, 4);
  put_le(&out, zip64 ? 0xFFFFFFFFu : cd_off, 4);
  put_le(&out, 0, 2);
  free(cd.p);
  return out;
}

/* IDX: 0, 0, type, ndim, big-endian dims, then data already big-endian. */
static buf idx_image(unsigned type, int rank, const uint32_t *dims, const void *be_data, size_t n) {
  buf b = {0};
  unsigned char magic[4] = {0, 0, (unsigned char)type, (unsigned char)rank};
  put(&b, magic, 4);
  for (int i = 0; i < rank; i++) put_be32(&b, dims[i]);
  put(&b, be_data, n);
  return b;
}

/* Elements of elem bytes, reversed in place (host little-endian <-> file big-endian). */
static void reverse_each(void *p, size_t n, size_t elem) {
  unsigned char *c = p;
  for (size_t off = 0; off < n; off += elem)
    for (size_t i = 0, j = elem - 1; i < j; i++, j--) {
      unsigned char t = c[off + i];
      c[off + i] = c[off + j];
      c[off + j] = t;
    }
}

/* ---- .npy --------------------------------------------------------------- */

typedef struct dtype_case {
  const char *descr;
  rc_dtype dtype;
  unsigned char data[48];
  size_t n;
} dtype_case;

static void npy_versions_and_dtypes(void) {
  static const int8_t i1[6] = {-128, -1, 0, 1, 127, 5};
  static const int16_t i2[6] = {-32768, -2, 0, 3, 32767, 300};
  static const uint16_t u2[6] = {0, 1, 2, 65535, 40000, 7};
  static const int32_t i4[6] = {INT32_MIN, -1, 0, 1, INT32_MAX, 123456};
  static const int64_t i8[6] = {INT64_MIN, -1, 0, 1, INT64_MAX, 1234567890123LL};
  static const float f4[6] = {-1.5f, 0.0f, 0.25f, 3.0e38f, -1e-30f, 7.0f};
  static const double f8[6] = {-1.5, 0.0, 0.1, 1e300, -1e-300, 7.0};
  dtype_case cases[10] = {
      {"|b1", RC_DTYPE_BOOL, {1, 0, 1, 1, 0, 0}, 6},
      {"|u1", RC_DTYPE_UINT8, {0, 1, 2, 255, 128, 7}, 6},
      {"|i1", RC_DTYPE_INT8, {0}, 6},
      {"<i2", RC_DTYPE_INT16, {0}, 12},
      {"<u2", RC_DTYPE_UINT16, {0}, 12},
      {"<i4", RC_DTYPE_INT32, {0}, 24},
      {"<i8", RC_DTYPE_INT64, {0}, 48},
      {"<f4", RC_DTYPE_FLOAT, {0}, 24},
      {"<f8", RC_DTYPE_DOUBLE, {0}, 48},
      {"<u1", RC_DTYPE_UINT8, {9, 8, 7, 6, 5, 4}, 6},
  };
  memcpy(cases[2].data, i1, 6);
  memcpy(cases[3].data, i2, 12);
  memcpy(cases[4].data, u2, 12);
  memcpy(cases[5].data, i4, 24);
  memcpy(cases[6].data, i8, 48);
  memcpy(cases[7].data, f4, 24);
  memcpy(cases[8].data, f8, 48);
  for (int v = 1; v <= 3; v++) {
    for (int c = 0; c < 10; c++) {
      char dict[160];
      snprintf(dict, sizeof dict, "{'descr': '%s', 'fortran_order': False, 'shape': (2, 3), }", cases[c].descr);
      buf b = npy_image(v, dict, cases[c].data, cases[c].n);
      CHECK_INT(b.n % 64, cases[c].n % 64); /* header padded to 64 per the spec */
      char name[64];
      snprintf(name, sizeof name, "v%d_%c%c.npy", v, cases[c].descr[1], cases[c].descr[2]);
      const char *path = tmp_path(name);
      write_file(path, b.p, b.n);
      rc_array a;
      rc_err e = {0};
      CHECK_INT(rc_array_read(&a, path, NULL, 0, &e), RC_OK);
      if (e.code) fprintf(stderr, "%s\n", e.msg);
      CHECK_INT(a.t.dtype, cases[c].dtype);
      CHECK_INT(a.t.rank, 2);
      CHECK_INT(a.t.dims[0], 2);
      CHECK_INT(a.t.dims[1], 3);
      CHECK_NOT_NULL(a.t.data);
      if (a.t.data) {
        CHECK_MEM_EQ(a.t.data, cases[c].data, cases[c].n);
      }
      rc_array_free(&a);
      CHECK_NULL(a.t.data);
      CHECK_NULL(a.owned);
      /* The memory entry point reads the same bytes the same way. */
      CHECK_INT(rc_array_read_mem(&a, b.p, b.n, RC_DATA_AUTO, "mem.npy", NULL, 0, &e), RC_OK);
      CHECK_NOT_NULL(a.t.data);
      if (a.t.data) {
        CHECK_MEM_EQ(a.t.data, cases[c].data, cases[c].n);
      }
      rc_array_free(&a);
      free(b.p);
    }
  }
}

static void npy_header_grammar(void) {
  const float v[3] = {1, 2, 3};
  const char *ok[] = {
      "{\"descr\": \"<f4\", \"fortran_order\": False, \"shape\": (3,)}",
      "{'shape': (3,), 'fortran_order': False, 'descr': '<f4'}",
      "{'descr':'<f4','fortran_order':False,'shape':(3L,)}",
      "{'descr': '<f4', 'fortran_order': True, 'shape': (1, 3)}", /* same layout either order */
      "{'descr': '<f4', 'fortran_order': False, 'shape': (1, 1, 3, 1), }",
  };
  for (size_t i = 0; i < sizeof ok / sizeof *ok; i++) {
    buf b = npy_image(1, ok[i], v, sizeof v);
    rc_array a;
    rc_err e = {0};
    CHECK_INT(rc_array_read_mem(&a, b.p, b.n, RC_DATA_NPY, "g.npy", NULL, 0, &e), RC_OK);
    if (e.code) fprintf(stderr, "case %zu: %s\n", i, e.msg);
    CHECK_INT(rc_tensor_numel(&a.t), 3);
    CHECK_NOT_NULL(a.t.data);
    if (a.t.data) {
      CHECK_EQ(((float *)a.t.data)[2], 3.0f);
    }
    rc_array_free(&a);
    free(b.p);
  }
  /* Scalar: shape () is rank 0 with one element. */
  buf b = npy_image(1, "{'descr': '<f8', 'fortran_order': False, 'shape': ()}", (double[]){2.5}, 8);
  rc_array a;
  rc_err e = {0};
  CHECK_INT(rc_array_read_mem(&a, b.p, b.n, RC_DATA_NPY, "s.npy", NULL, 0, &e), RC_OK);
  CHECK_INT(a.t.rank, 0);
  CHECK_NOT_NULL(a.t.data);
  if (a.t.data) {
    CHECK_EQ(*(double *)a.t.data, 2.5);
  }
  rc_array_free(&a);
  free(b.p);
  /* float16 by IEEE 754 binary16 bit patterns. */
  const uint16_t h[4] = {0x3c00, 0xc000, 0x3800, 0x0001};
  b = npy_image(1, "{'descr': '<f2', 'fortran_order': False, 'shape': (4,)}", h, sizeof h);
  CHECK_INT(rc_array_read_mem(&a, b.p, b.n, RC_DATA_NPY, "h.npy", NULL, 0, &e), RC_OK);
  float f[4];
  CHECK_INT(rc_data_to_float(f, &a, 0, 4, NULL, &e), RC_OK);
  CHECK_EQ(f[0], 1.0f);
  CHECK_EQ(f[1], -2.0f);
  CHECK_EQ(f[2], 0.5f);
  CHECK_NEAR(f[3], 5.9604644775390625e-08, 0, 1e-7); /* smallest subnormal, 2^-24 */
  rc_array_free(&a);
  free(b.p);
}

/* Expect an error of `code` whose message contains `needle`. */
static void expect_mem_error(const void *p, size_t n, rc_data_format fmt, size_t max_bytes, rc_status code,
                             const char *needle) {
  rc_array a;
  rc_err e = {0};
  rc_status st = rc_array_read_mem(&a, p, n, fmt, "bad.npy", NULL, max_bytes, &e);
  CHECK_INT(st, code);
  CHECK_STR_CONTAINS(e.msg, "bad.npy");
  if (needle) CHECK_STR_CONTAINS(e.msg, needle);
  CHECK_NULL(a.t.data);
  CHECK_NULL(a.owned);
}

static void npy_corrupt_files(void) {
  const float v[6] = {0};
  const char *good = "{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3)}";
  struct {
    const char *dict;
    rc_status code;
    const char *needle;
  } bad[] = {
      {"{'descr': '<f4', 'fortran_order': True, 'shape': (2, 3)}", RC_ERR_UNSUPPORTED, "Fortran"},
      {"{'descr': '|O', 'fortran_order': False, 'shape': (2, 3)}", RC_ERR_UNSUPPORTED, "pickled"},
      {"{'descr': '>f4', 'fortran_order': False, 'shape': (2, 3)}", RC_ERR_UNSUPPORTED, "big-endian"},
      {"{'descr': '<c8', 'fortran_order': False, 'shape': (2, 3)}", RC_ERR_UNSUPPORTED, "<c8"},
      {"{'descr': '<U4', 'fortran_order': False, 'shape': (2, 3)}", RC_ERR_UNSUPPORTED, "<U4"},
      {"{'descr': [('a', '<f4')], 'fortran_order': False, 'shape': (2, 3)}", RC_ERR_UNSUPPORTED, "structured"},
      {"{'descr': '<f4', 'fortran_order': False, 'shape': (2, -3)}", RC_ERR_FORMAT, "negative"},
      {"{'descr': '<f4', 'fortran_order': False, 'shape': (1000000000000, 1000000)}", RC_ERR_LIMIT, "limit"},
      {"{'descr': '<f4', 'fortran_order': False, 'shape': (4611686018427387904, 4)}", RC_ERR_LIMIT, "overflow"},
      {"{'descr': '<f4', 'fortran_order': False, 'shape': (99999999999999999999,)}", RC_ERR_LIMIT, "64 bits"},
      {"{'descr': '<f4', 'fortran_order': False, 'shape': (1,1,1,1,1,1,1,1,6)}", RC_ERR_UNSUPPORTED, "dimensions"},
      {"{'descr': '<f4', 'fortran_order': False}", RC_ERR_FORMAT, "missing key 'shape'"},
      {"{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3), 'x': 1}", RC_ERR_FORMAT, "unexpected key"},
      {"{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3), 'descr': '<f4'}", RC_ERR_FORMAT, "twice"},
      {"{'descr': '<f4', 'fortran_order': 0, 'shape': (2, 3)}", RC_ERR_FORMAT, "True or False"},
      {"{'descr': '<f4', 'fortran_order': False, 'shape': [2, 3]}", RC_ERR_FORMAT, "tuple"},
      {"{'descr': '<f4', 'fortran_order': False, 'shape': __import__('os')}", RC_ERR_FORMAT, "tuple"},
      {"{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3)} x", RC_ERR_FORMAT, "after the closing"},
      {"{'descr': '<f\\x34', 'fortran_order': False, 'shape': (2, 3)}", RC_ERR_FORMAT, "escape"},
      {"{'descr': '<f4, 'fortran_order': False, 'shape': (2, 3)}", RC_ERR_FORMAT, "header"},
      {"('descr', '<f4')", RC_ERR_FORMAT, "'{'"},
  };
  for (size_t i = 0; i < sizeof bad / sizeof *bad; i++) {
    buf b = npy_image(1, bad[i].dict, v, sizeof v);
    expect_mem_error(b.p, b.n, RC_DATA_AUTO, 0, bad[i].code, bad[i].needle);
    free(b.p);
  }
  buf b = npy_image(1, good, v, sizeof v);
  /* Truncated at every length: each one an error, never a crash. */
  for (size_t cut = 0; cut < b.n; cut++) {
    rc_array a;
    rc_err e = {0};
    CHECK_FAILS(rc_array_read_mem(&a, b.p, cut, RC_DATA_NPY, "cut.npy", NULL, 0, &e));
    CHECK_STR_CONTAINS(e.msg, "cut.npy");
  }
  expect_mem_error(b.p, b.n - 4, RC_DATA_NPY, 0, RC_ERR_FORMAT, "needs 24 data bytes, the file has 20");
  /* Bytes after the data: a second array appended to the file. */
  buf longer = {0};
  put(&longer, b.p, b.n);
  put(&longer, "abcd", 4);
  expect_mem_error(longer.p, longer.n, RC_DATA_NPY, 0, RC_ERR_FORMAT, "4 bytes follow");
  free(longer.p);
  /* The caller's byte limit holds before anything is allocated. */
  expect_mem_error(b.p, b.n, RC_DATA_NPY, 16, RC_ERR_LIMIT, "over the limit of 16");
  /* Wrong magic, unknown version, header length past the end. */
  b.p[1] = 'X';
  expect_mem_error(b.p, b.n, RC_DATA_NPY, 0, RC_ERR_FORMAT, "\\x93NUMPY");
  b.p[1] = 'N';
  b.p[6] = 4;
  expect_mem_error(b.p, b.n, RC_DATA_NPY, 0, RC_ERR_UNSUPPORTED, "version 4.0");
  b.p[6] = 1;
  b.p[8] = 0xff;
  b.p[9] = 0xff;
  expect_mem_error(b.p, b.n, RC_DATA_NPY, 0, RC_ERR_FORMAT, "header needs 65535 bytes");
  free(b.p);
  /* A 2.0 header claiming 2 GiB is refused by the header cap, not allocated. */
  buf v2 = npy_image(2, good, v, sizeof v);
  v2.p[8] = 0;
  v2.p[9] = 0;
  v2.p[10] = 0;
  v2.p[11] = 0x80;
  expect_mem_error(v2.p, v2.n, RC_DATA_NPY, 0, RC_ERR_LIMIT, "header length");
  free(v2.p);
  /* Through a file: the message names the path. */
  const char *path = tmp_path("fortran.npy");
  b = npy_image(1, bad[0].dict, v, sizeof v);
  write_file(path, b.p, b.n);
  free(b.p);
  rc_array a;
  rc_err e = {0};
  CHECK_INT(rc_array_read(&a, path, NULL, 0, &e), RC_ERR_UNSUPPORTED);
  CHECK_STR_CONTAINS(e.msg, "fortran.npy: ");
  CHECK_STR_CONTAINS(e.msg, "Fortran");
}

static void detection_and_plain_errors(void) {
  rc_array a;
  rc_err e = {0};
  /* Magic first: IDX bytes in a file named .npy are read as IDX. */
  const uint8_t px[4] = {1, 2, 3, 4};
  buf b = idx_image(0x08, 1, (uint32_t[]){4}, px, 4);
  const char *path = tmp_path("really_idx.npy");
  write_file(path, b.p, b.n);
  CHECK_INT(rc_array_read(&a, path, NULL, 0, &e), RC_OK);
  CHECK_INT(a.t.dtype, RC_DTYPE_UINT8);
  CHECK_INT(a.t.dims[0], 4);
  rc_array_free(&a);
  /* A member name on a non-zip file is refused. */
  CHECK_INT(rc_array_read(&a, path, "x", 0, &e), RC_ERR_INVALID);
  free(b.p);
  /* Extension second: garbage named .npy gets the .npy reader's complaint. */
  path = tmp_path("garbage.npy");
  write_file(path, "hello world, no magic", 21);
  CHECK_INT(rc_array_read(&a, path, NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "garbage.npy: not a .npy file");
  path = tmp_path("garbage.bin");
  write_file(path, "hello world, no magic", 21);
  CHECK_INT(rc_array_read(&a, path, NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "garbage.bin: not a recognised data file (first bytes: 68 65 6c");
  path = tmp_path("empty.npy");
  write_file(path, "", 0);
  CHECK_INT(rc_array_read(&a, path, NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "empty.npy: empty file");
  CHECK_INT(rc_array_read(&a, tmp_path("missing.npy"), NULL, 0, &e), RC_ERR_IO);
  CHECK_STR_CONTAINS(e.msg, "missing.npy: cannot open");
  CHECK_INT(rc_array_read(&a, tmpdir, NULL, 0, &e), RC_ERR_IO);
  CHECK_STR_CONTAINS(e.msg, "not a regular file");
  CHECK_INT(rc_data_detect("\x93NUMPY\x01\x00", 8), RC_DATA_NPY);
  CHECK_INT(rc_data_detect("PK\x03\x04", 4), RC_DATA_NPZ);
  CHECK_INT(rc_data_detect("\x1f\x8b\x08", 3), RC_DATA_GZIP);
  CHECK_INT(rc_data_detect("\x08\x01\x12\x00", 4), RC_DATA_AUTO); /* protobuf tag, not IDX */
  /* .pb goes to the ONNX module's TensorProto reader, which names the file. */
  path = tmp_path("junk.pb");
  write_file(path, "\xff\xff\xff\xff", 4);
  CHECK_FAILS(rc_array_read(&a, path, NULL, 0, &e));
  CHECK_STR_CONTAINS(e.msg, "junk.pb");
  CHECK_NULL(a.t.data);
  CHECK_NULL(a.owned);
  /* TensorProto needs a file. */
  CHECK_INT(rc_array_read_mem(&a, "\x08\x01", 2, RC_DATA_TENSORPROTO, "t.pb", NULL, 0, &e), RC_ERR_UNSUPPORTED);
}

/* ---- .npz --------------------------------------------------------------- */

static void npz_members(void) {
  const float x[4] = {1.5f, -2.0f, 3.25f, 0.0f};
  int64_t y[1000];
  for (int i = 0; i < 1000; i++) y[i] = i % 7 - 3;
  buf nx = npy_image(1, "{'descr': '<f4', 'fortran_order': False, 'shape': (2, 2), }", x, sizeof x);
  buf ny = npy_image(1, "{'descr': '<i8', 'fortran_order': False, 'shape': (1000,), }", y, sizeof y);
  for (int zip64 = 0; zip64 <= 1; zip64++) {
    zmember m[2] = {{"x.npy", nx.p, nx.n, 0}, {"y.npy", ny.p, ny.n, 1}};
    buf z = make_zip(m, 2, zip64);
    const char *path = tmp_path(zip64 ? "pair64.npz" : "pair.npz");
    write_file(path, z.p, z.n);
    rc_array a;
    rc_err e = {0};
    CHECK_INT(rc_array_read(&a, path, "x", 0, &e), RC_OK);
    if (e.code) fprintf(stderr, "%s\n", e.msg);
    CHECK_INT(a.t.dtype, RC_DTYPE_FLOAT);
    CHECK_NOT_NULL(a.t.data);
    if (a.t.data) {
      CHECK_MEM_EQ(a.t.data, x, sizeof x);
    }
    rc_array_free(&a);
    CHECK_INT(rc_array_read(&a, path, "y.npy", 0, &e), RC_OK);
    CHECK_INT(a.t.dtype, RC_DTYPE_INT64);
    CHECK_INT(a.t.dims[0], 1000);
    CHECK_NOT_NULL(a.t.data);
    if (a.t.data) {
      CHECK_MEM_EQ(a.t.data, y, sizeof y);
    }
    rc_array_free(&a);
    CHECK_INT(rc_array_read(&a, path, NULL, 0, &e), RC_OK); /* the first member */
    CHECK_INT(a.t.dtype, RC_DTYPE_FLOAT);
    rc_array_free(&a);
    CHECK_INT(rc_array_read(&a, path, "z", 0, &e), RC_ERR_INVALID);
    CHECK_STR_CONTAINS(e.msg, "no member 'z' (members: 'x.npy', 'y.npy')");
    char **names;
    int count;
    CHECK_INT(rc_npz_list(&names, &count, path, &e), RC_OK);
    CHECK_INT(count, 2);
    CHECK_EQ(count, 2);
    CHECK_STR_EQ(names[0], "x.npy");
    CHECK_STR_EQ(names[1], "y.npy");
    CHECK_NULL(names[2]);
    rc_data_names_free(names);
    /* A deflated member larger than the limit is refused from its directory size. */
    CHECK_INT(rc_array_read(&a, path, "y", 100, &e), RC_ERR_LIMIT);
    CHECK_STR_CONTAINS(e.msg, "member 'y.npy'");
    free(z.p);
  }
  free(nx.p);
  free(ny.p);
}

static void npz_corrupt_files(void) {
  const int32_t x[64] = {1, 2, 3};
  buf nx = npy_image(1, "{'descr': '<i4', 'fortran_order': False, 'shape': (64,), }", x, sizeof x);
  zmember stored = {"x.npy", nx.p, nx.n, 0}, deflated = {"x.npy", nx.p, nx.n, 1};
  rc_array a;
  rc_err e = {0};
  /* Bad CRC: one data byte changed after the archive was written. */
  buf z = make_zip(&stored, 1, 0);
  z.p[30 + 5 + nx.n - 1] ^= 0x40;
  CHECK_INT(rc_array_read_mem(&a, z.p, z.n, RC_DATA_AUTO, "crc.npz", NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "crc.npz: member 'x.npy': CRC-32 mismatch");
  free(z.p);
  z = make_zip(&deflated, 1, 0);
  z.p[14] ^= 0x01; /* the CRC field of the local header is not used... */
  CHECK_INT(rc_array_read_mem(&a, z.p, z.n, RC_DATA_AUTO, "ok.npz", NULL, 0, &e), RC_OK);
  rc_array_free(&a);
  /* ...the central directory's is. */
  size_t cd = z.n - 22 - 46 - 5;
  z.p[cd + 16] ^= 0x01;
  CHECK_INT(rc_array_read_mem(&a, z.p, z.n, RC_DATA_AUTO, "crc2.npz", NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "CRC-32 mismatch");
  z.p[cd + 16] ^= 0x01;
  /* Unsupported method and encryption. */
  z.p[cd + 10] = 12;
  CHECK_INT(rc_array_read_mem(&a, z.p, z.n, RC_DATA_AUTO, "m.npz", NULL, 0, &e), RC_ERR_UNSUPPORTED);
  CHECK_STR_CONTAINS(e.msg, "compression method 12");
  z.p[cd + 10] = 8;
  z.p[cd + 8] = 1;
  CHECK_INT(rc_array_read_mem(&a, z.p, z.n, RC_DATA_AUTO, "enc.npz", NULL, 0, &e), RC_ERR_UNSUPPORTED);
  CHECK_STR_CONTAINS(e.msg, "encrypted");
  z.p[cd + 8] = 0;
  /* A directory that lies about the inflated size, either way. */
  uint32_t real = (uint32_t)nx.n;
  z.p[cd + 24] = (unsigned char)(real - 8);
  CHECK_INT(rc_array_read_mem(&a, z.p, z.n, RC_DATA_AUTO, "lie.npz", NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "longer than");
  z.p[cd + 24] = (unsigned char)(real + 8);
  z.p[cd + 25] = (unsigned char)((real + 8) >> 8);
  CHECK_INT(rc_array_read_mem(&a, z.p, z.n, RC_DATA_AUTO, "lie.npz", NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "truncated");
  z.p[cd + 24] = (unsigned char)real;
  z.p[cd + 25] = (unsigned char)(real >> 8);
  /* A huge claimed size is refused before allocation. */
  z.p[cd + 27] = 0x7f;
  CHECK_INT(rc_array_read_mem(&a, z.p, z.n, RC_DATA_AUTO, "big.npz", NULL, 1 << 20, &e), RC_ERR_LIMIT);
  z.p[cd + 27] = 0;
  CHECK_INT(rc_array_read_mem(&a, z.p, z.n, RC_DATA_AUTO, "again.npz", NULL, 0, &e), RC_OK);
  rc_array_free(&a);
  /* Deflate stream damage: an error, whichever check notices first. */
  for (size_t i = 30 + 5; i < 30 + 5 + 20; i++) {
    z.p[i] ^= 0xA5;
    CHECK_FAILS(rc_array_read_mem(&a, z.p, z.n, RC_DATA_AUTO, "dmg.npz", NULL, 0, &e));
    z.p[i] ^= 0xA5;
  }
  /* Truncated at every length. */
  for (size_t cut = 0; cut < z.n; cut++) {
    rc_status st = rc_array_read_mem(&a, z.p, cut, RC_DATA_NPZ, "cut.npz", NULL, 0, &e);
    CHECK_FAILS(st);
    if (st == RC_OK) rc_array_free(&a);
  }
  free(z.p);
  /* The zip64 form truncated and with its locator damaged. */
  z = make_zip(&stored, 1, 1);
  for (size_t cut = 0; cut < z.n; cut += 3) CHECK_FAILS(rc_array_read_mem(&a, z.p, cut, RC_DATA_NPZ, "c.npz", NULL, 0, &e));
  z.p[z.n - 22 - 20] ^= 0xff;
  CHECK_INT(rc_array_read_mem(&a, z.p, z.n, RC_DATA_NPZ, "loc.npz", NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "loc.npz: zip: ");
  free(z.p);
  /* A member that is not .npy data. */
  zmember text = {"x.npy", (const unsigned char *)"just text", 9, 0};
  z = make_zip(&text, 1, 0);
  CHECK_INT(rc_array_read_mem(&a, z.p, z.n, RC_DATA_AUTO, "t.npz", NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "t.npz: member 'x.npy': not a .npy file");
  free(z.p);
  /* An archive with no members. */
  z = make_zip(NULL, 0, 0);
  CHECK_INT(rc_array_read_mem(&a, z.p, z.n, RC_DATA_AUTO, "none.npz", NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "no members");
  free(z.p);
  free(nx.p);
}

/* Every allocation failure on the way returns NOMEM and leaks nothing
 * (leaks are caught by the sanitizer build). */
static void npz_and_gzip_out_of_memory(void) {
  const double x[32] = {1, 2, 3};
  buf nx = npy_image(2, "{'descr': '<f8', 'fortran_order': False, 'shape': (4, 8), }", x, sizeof x);
  zmember m = {"x.npy", nx.p, nx.n, 1};
  buf z = make_zip(&m, 1, 0);
  buf g = deflate_raw(nx.p, nx.n, 1);
  const buf *inputs[2] = {&z, &g};
  for (int which = 0; which < 2; which++) {
    int succeeded = 0;
    for (long k = 1; k < 20 && !succeeded; k++) {
      rc_array a;
      rc_err e = {0};
      rc_alloc_set_fail_after(k);
      rc_status st = rc_array_read_mem(&a, inputs[which]->p, inputs[which]->n, RC_DATA_AUTO, "oom", NULL, 0, &e);
      rc_alloc_set_fail_after(0);
      if (st == RC_OK) {
        succeeded = 1;
        CHECK_EQ(((double *)a.t.data)[2], 3.0);
        rc_array_free(&a);
      } else {
        CHECK_INT(st, RC_ERR_NOMEM);
      }
    }
    CHECK(succeeded);
  }
  free(nx.p);
  free(z.p);
  free(g.p);
}

/* Seeded random byte damage to every container: each read succeeds or
 * fails with a message, never crashes (run under the sanitizer build to also
 * catch out-of-bounds reads). */
static void random_damage(void) {
  const float x[40] = {1, 2, 3};
  buf nx = npy_image(3, "{'descr': '<f4', 'fortran_order': False, 'shape': (5, 8), }", x, sizeof x);
  zmember ms = {"x.npy", nx.p, nx.n, 0}, md = {"x.npy", nx.p, nx.n, 1};
  buf idx = idx_image(0x0D, 2, (uint32_t[]){5, 8}, x, sizeof x);
  buf images[5] = {nx, make_zip(&ms, 1, 0), make_zip(&md, 1, 0), make_zip(&md, 1, 1), deflate_raw(idx.p, idx.n, 1)};
  rc_rng r;
  rc__rng_seed(&r, 2024, 3);
  int failures = 0, successes = 0;
  for (int k = 0; k < 5; k++) {
    unsigned char *copy = malloc(images[k].n);
    for (int trial = 0; trial < 400; trial++) {
      memcpy(copy, images[k].p, images[k].n);
      int flips = 1 + (int)rc__rng_below(&r, 4);
      for (int f = 0; f < flips; f++) copy[rc__rng_below(&r, images[k].n)] = (unsigned char)rc__rng_next32(&r);
      rc_array a;
      rc_err e = {0};
      rc_status st = rc_array_read_mem(&a, copy, images[k].n, RC_DATA_AUTO, "damaged", NULL, 1 << 20, &e);
      if (st == RC_OK) {
        successes++;
        rc_array_free(&a);
      } else {
        failures++;
        CHECK_STR_CONTAINS(e.msg, "damaged: ");
      }
    }
    free(copy);
  }
  CHECK_GT(failures, 0);
  CHECK_GT(successes, 0);
  for (int k = 0; k < 5; k++) free(images[k].p);
  free(idx.p);
}

/* ---- IDX ---------------------------------------------------------------- */

static void idx_types(void) {
  const uint8_t u8[6] = {0, 1, 2, 128, 254, 255};
  const int8_t s8[6] = {-128, -1, 0, 1, 2, 127};
  const int16_t s16[6] = {-32768, -300, -1, 0, 300, 32767};
  const int32_t s32[6] = {INT32_MIN, -70000, -1, 0, 70000, INT32_MAX};
  const float f32[6] = {-1.5f, 0.0f, 0.1f, 1e30f, -2.0f, 9.0f};
  const double f64[6] = {-1.5, 0.0, 0.1, 1e300, -2.0, 9.0};
  struct {
    unsigned code;
    rc_dtype dt;
    const void *v;
    size_t elem;
  } cases[] = {{0x08, RC_DTYPE_UINT8, u8, 1},  {0x09, RC_DTYPE_INT8, s8, 1},  {0x0B, RC_DTYPE_INT16, s16, 2},
               {0x0C, RC_DTYPE_INT32, s32, 4}, {0x0D, RC_DTYPE_FLOAT, f32, 4}, {0x0E, RC_DTYPE_DOUBLE, f64, 8}};
  const uint32_t dims[3] = {3, 1, 2};
  for (size_t c = 0; c < sizeof cases / sizeof *cases; c++) {
    unsigned char be[48];
    memcpy(be, cases[c].v, 6 * cases[c].elem);
    reverse_each(be, 6 * cases[c].elem, cases[c].elem);
    buf b = idx_image(cases[c].code, 3, dims, be, 6 * cases[c].elem);
    for (int gz = 0; gz <= 1; gz++) {
      buf g = gz ? deflate_raw(b.p, b.n, 1) : b;
      char name[32];
      snprintf(name, sizeof name, "t%02x%s", cases[c].code, gz ? ".gz" : "-ubyte");
      const char *path = tmp_path(name);
      write_file(path, g.p, g.n);
      rc_array a;
      rc_err e = {0};
      CHECK_INT(rc_array_read(&a, path, NULL, 0, &e), RC_OK);
      if (e.code) fprintf(stderr, "%s\n", e.msg);
      CHECK_INT(a.t.dtype, cases[c].dt);
      CHECK_INT(a.t.rank, 3);
      CHECK_EQ(a.t.dims[0], 3);
      CHECK_EQ(a.t.dims[1], 1);
      CHECK_EQ(a.t.dims[2], 2);
      CHECK_NOT_NULL(a.t.data);
      if (a.t.data) {
        CHECK_MEM_EQ(a.t.data, cases[c].v, 6 * cases[c].elem);
      }
      rc_array_free(&a);
      if (gz) free(g.p);
    }
    free(b.p);
  }
}

static void idx_corrupt_and_bombs(void) {
  const uint8_t px[12] = {1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12};
  buf b = idx_image(0x08, 3, (uint32_t[]){3, 2, 2}, px, 12);
  rc_array a;
  rc_err e = {0};
  for (size_t cut = 0; cut < b.n; cut++)
    CHECK_FAILS(rc_array_read_mem(&a, b.p, cut, RC_DATA_IDX, "cut-ubyte", NULL, 0, &e));
  CHECK_INT(rc_array_read_mem(&a, b.p, b.n - 1, RC_DATA_IDX, "x", NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "needs 12 data bytes, the file has 11");
  b.p[2] = 0x0A;
  CHECK_INT(rc_array_read_mem(&a, b.p, b.n, RC_DATA_IDX, "x", NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "type code 0x0a");
  b.p[2] = 0x08;
  b.p[0] = 1;
  CHECK_INT(rc_array_read_mem(&a, b.p, b.n, RC_DATA_IDX, "x", NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "first two bytes");
  b.p[0] = 0;
  b.p[3] = 0;
  CHECK_INT(rc_array_read_mem(&a, b.p, b.n, RC_DATA_IDX, "x", NULL, 0, &e), RC_ERR_FORMAT);
  b.p[3] = 3;
  /* Huge dims: refused by the limit or by overflow, never allocated. */
  memset(b.p + 4, 0xff, 12);
  CHECK_INT(rc_array_read_mem(&a, b.p, b.n, RC_DATA_IDX, "x", NULL, 0, &e), RC_ERR_LIMIT);
  free(b.p);
  /* Gzip: truncated at many points, garbage after, concatenated members. */
  b = idx_image(0x08, 3, (uint32_t[]){3, 2, 2}, px, 12);
  buf g = deflate_raw(b.p, b.n, 1);
  for (size_t cut = 0; cut < g.n; cut++)
    CHECK_FAILS(rc_array_read_mem(&a, g.p, cut, RC_DATA_GZIP, "cut.gz", NULL, 0, &e));
  buf tail = {0};
  put(&tail, g.p, g.n);
  put(&tail, "junk", 4);
  CHECK_INT(rc_array_read_mem(&a, tail.p, tail.n, RC_DATA_AUTO, "j.gz", NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "garbage after");
  free(tail.p);
  buf g1 = deflate_raw(b.p, 10, 1), g2 = deflate_raw(b.p + 10, b.n - 10, 1), both = {0};
  put(&both, g1.p, g1.n);
  put(&both, g2.p, g2.n);
  CHECK_INT(rc_array_read_mem(&a, both.p, both.n, RC_DATA_AUTO, "two.gz", NULL, 0, &e), RC_OK);
  CHECK_NOT_NULL(a.t.data);
  if (a.t.data) {
    CHECK_MEM_EQ(a.t.data, px, 12);
  }
  rc_array_free(&a);
  free(g1.p);
  free(g2.p);
  free(both.p);
  free(g.p);
  free(b.p);
  /* Gzip of text: neither IDX nor .npy inside. */
  g = deflate_raw("plain text inside", 17, 1);
  CHECK_INT(rc_array_read_mem(&a, g.p, g.n, RC_DATA_AUTO, "t.gz", NULL, 0, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "neither IDX nor .npy");
  free(g.p);
  /* A bomb: 64 MiB of zeros behind a header claiming them, about 64 KiB
   * compressed. The limit stops inflation at 1 MiB plus header room. */
  size_t big = (size_t)64 << 20;
  unsigned char *zeros = calloc(1, big + 16);
  buf hdr = idx_image(0x08, 1, (uint32_t[]){(uint32_t)big}, NULL, 0);
  memcpy(zeros, hdr.p, hdr.n);
  g = deflate_raw(zeros, big + hdr.n, 1);
  free(zeros);
  free(hdr.p);
  CHECK_LT(g.n, ((size_t)1 << 20));
  const char *path = tmp_path("bomb.gz");
  write_file(path, g.p, g.n);
  free(g.p);
  CHECK_INT(rc_array_read(&a, path, NULL, (size_t)1 << 20, &e), RC_ERR_LIMIT);
  CHECK_STR_CONTAINS(e.msg, "bomb.gz: gzip data inflates past the limit");
  /* With a limit that allows it, the same file reads. */
  CHECK_INT(rc_array_read(&a, path, NULL, (size_t)80 << 20, &e), RC_OK);
  CHECK_INT(a.t.dims[0], (int64_t)big);
  rc_array_free(&a);
}

/* The real Fashion-MNIST test files from Debian's dataset-fashion-mnist; its
 * own ctest entry (test_data_fashion_mnist), skipped when they are absent. */
static void fashion_mnist_files(void) {
  const char *img = "/usr/share/datasets/fashion-mnist/t10k-images-idx3-ubyte.gz";
  const char *lab = "/usr/share/datasets/fashion-mnist/t10k-labels-idx1-ubyte.gz";
  if (access(img, R_OK) != 0 || access(lab, R_OK) != 0)
    SKIP_CASE("Fashion-MNIST files absent (Debian package dataset-fashion-mnist)");
  rc_array x, y, y32, xf;
  rc_err e = {0};
  CHECK_INT(rc_array_read(&x, img, NULL, 0, &e), RC_OK);
  CHECK_INT(rc_array_read(&y, lab, NULL, 0, &e), RC_OK);
  if (e.code) {
    fprintf(stderr, "%s\n", e.msg);
    return;
  }
  /* Source: Fashion-MNIST's published description (Debian dataset-fashion-mnist). */
  CHECK_INT(x.t.dtype, RC_DTYPE_UINT8);
  CHECK_INT(x.t.rank, 3);
  CHECK_EQ(x.t.dims[0], 10000);
  CHECK_EQ(x.t.dims[1], 28);
  CHECK_EQ(x.t.dims[2], 28);
  CHECK_INT(y.t.dtype, RC_DTYPE_UINT8);
  CHECK_INT(y.t.rank, 1);
  CHECK_INT(y.t.dims[0], 10000);
  CHECK_INT(rc_labels_check(&y, 10000, 10, &e), RC_OK);
  CHECK_INT(rc_labels_check(&y, 10000, 9, &e), RC_ERR_INVALID); /* class 9 exists */
  CHECK_STR_CONTAINS(e.msg, "outside 0..8");
  CHECK_INT(rc_labels_to_int32(&y32, &y, 10000, 10, &e), RC_OK);
  int counts[10] = {0};
  for (int i = 0; i < 10000; i++) counts[((int32_t *)y32.t.data)[i]]++;
  for (int c = 0; c < 10; c++) CHECK_INT(counts[c], 1000); /* balanced test set (from memory) */
  /* Feeding a (1, 28, 28) model input, scaled to [0, 1]. */
  rc_tensor model = {RC_DTYPE_FLOAT, 3, {1, 28, 28}, NULL};
  CHECK_INT(rc_data_fit(&x, &model, &e), RC_OK);
  CHECK_EQ(x.t.rank, 4);
  CHECK_EQ(x.t.dims[1], 1);
  CHECK_EQ(x.t.dims[3], 28);
  rc_data_norm nm;
  rc_data_norm_identity(&nm);
  nm.scale = 1.0f / 255.0f;
  CHECK_INT(rc_data_to_float_array(&xf, &x, &nm, &e), RC_OK);
  float lo = 1, hi = 0;
  const float *f = xf.t.data;
  for (int64_t i = 0; i < rc_tensor_numel(&xf.t); i++) {
    lo = f[i] < lo ? f[i] : lo;
    hi = f[i] > hi ? f[i] : hi;
  }
  CHECK_EQ(lo, 0.0f);
  CHECK_EQ(hi, 1.0f);
  rc_array_free(&xf);
  rc_array_free(&y32);
  rc_array_free(&x);
  rc_array_free(&y);
}

/* ---- conversion, fitting, labels ---------------------------------------- */

static void parse_float_lists(void) {
  float v[4];
  int n;
  rc_err e = {0};
  CHECK_INT(rc_data_parse_floats("0.5,0.25, 0.125", v, 4, &n, &e), RC_OK);
  CHECK_EQ(n, 3);
  CHECK_EQ(v[0], 0.5f);
  CHECK_EQ(v[1], 0.25f);
  CHECK_EQ(v[2], 0.125f);
  CHECK_INT(rc_data_parse_floats(" -1e-3 ", v, 4, &n, &e), RC_OK);
  CHECK_EQ(n, 1);
  CHECK_EQ(v[0], -1e-3f);
  const char *bad[] = {"", "1,,2", "1,", ",1", "abc", "nan", "inf", "1e50", "1,2x", "1 2", "1,2,3,4,5"};
  for (size_t i = 0; i < sizeof bad / sizeof *bad; i++) {
    CHECK_INT(rc_data_parse_floats(bad[i], v, 4, &n, &e), RC_ERR_INVALID);
    CHECK_STR_CONTAINS(e.msg, bad[i]);
  }
}

static void float_conversion(void) {
  /* uint8 (2, 3, 1, 2): x' = (x/255*... ) with per-channel mean and std. */
  uint8_t px[12] = {0, 255, 51, 102, 153, 204, 10, 20, 30, 40, 50, 60};
  rc_array a = {{RC_DTYPE_UINT8, 4, {2, 3, 1, 2}, px}, NULL};
  float mean[3] = {0.5f, 0.25f, 0.0f}, sd[3] = {0.5f, 2.0f, 1.0f};
  rc_data_norm nm = {1.0f / 255.0f, mean, 3, sd, 3};
  float out[12];
  rc_err e = {0};
  CHECK_INT(rc_data_to_float(out, &a, 0, 2, &nm, &e), RC_OK);
  for (int s = 0; s < 2; s++)
    for (int c = 0; c < 3; c++)
      for (int i = 0; i < 2; i++) {
        int k = s * 6 + c * 2 + i;
        double want = ((double)px[k] / 255.0 - mean[c]) / sd[c];
        CHECK_NEAR(out[k], want, 1e-6, 1e-6);
      }
  CHECK_NEAR(out[1], 1.0, 1e-6, 0); /* (255/255 - 0.5) / 0.5 */
  /* A range of samples; scalar mean/std. */
  float m1 = 10.0f, d1 = 2.0f;
  rc_data_norm sc = {1.0f, &m1, 1, &d1, 1};
  CHECK_INT(rc_data_to_float(out, &a, 1, 1, &sc, &e), RC_OK);
  CHECK_NEAR(out[0], 0.0, 0, 0);  /* (10 - 10) / 2 */
  CHECK_NEAR(out[5], 25.0, 0, 0); /* (60 - 10) / 2 */
  CHECK_INT(rc_data_to_float(out, &a, 1, 2, &sc, &e), RC_ERR_INVALID);
  /* Per-channel values must match axis 1. */
  float m4[4] = {0};
  rc_data_norm bad = {1.0f, m4, 4, NULL, 0};
  CHECK_INT(rc_data_to_float(out, &a, 0, 2, &bad, &e), RC_ERR_SHAPE);
  CHECK_STR_CONTAINS(e.msg, "(2, 3, 1, 2)");
  float zero = 0.0f;
  rc_data_norm zs = {1.0f, NULL, 0, &zero, 1};
  CHECK_INT(rc_data_to_float(out, &a, 0, 2, &zs, &e), RC_ERR_INVALID);
  CHECK_STR_CONTAINS(e.msg, "std[0]");
  /* Non-finite results name the sample and element. */
  double dv[8] = {0, 1, 2, 3, 4, 5, NAN, 7};
  rc_array d = {{RC_DTYPE_DOUBLE, 2, {2, 4}, dv}, NULL};
  CHECK_INT(rc_data_to_float(out, &d, 0, 2, NULL, &e), RC_ERR_NUMERIC);
  CHECK_STR_CONTAINS(e.msg, "sample 1, element 2: NaN");
  dv[6] = 1e300; /* beyond float32 */
  CHECK_INT(rc_data_to_float(out, &d, 0, 2, NULL, &e), RC_ERR_NUMERIC);
  CHECK_STR_CONTAINS(e.msg, "sample 1, element 2: +inf");
  dv[6] = 6;
  rc_array f;
  CHECK_INT(rc_data_to_float_array(&f, &d, NULL, &e), RC_OK);
  CHECK_EQ(f.t.dtype, RC_DTYPE_FLOAT);
  CHECK_EQ(f.t.dims[1], 4);
  CHECK_EQ(((float *)f.t.data)[6], 6.0f);
  rc_array_free(&f);
  /* NaN read from an .npy file is refused at conversion. */
  const float nanv[3] = {1.0f, NAN, 2.0f};
  buf b = npy_image(1, "{'descr': '<f4', 'fortran_order': False, 'shape': (3, 1), }", nanv, sizeof nanv);
  CHECK_INT(rc_array_read_mem(&f, b.p, b.n, RC_DATA_AUTO, "nan.npy", NULL, 0, &e), RC_OK);
  rc_array g;
  CHECK_INT(rc_data_to_float_array(&g, &f, NULL, &e), RC_ERR_NUMERIC);
  CHECK_STR_CONTAINS(e.msg, "sample 1, element 0: NaN");
  rc_array_free(&f);
  free(b.p);
  /* Every numeric dtype converts. */
  int64_t i8[2] = {-5, 1LL << 40};
  rc_array ia = {{RC_DTYPE_INT64, 1, {2}, i8}, NULL};
  CHECK_INT(rc_data_to_float(out, &ia, 0, 2, NULL, &e), RC_OK);
  CHECK_EQ(out[0], -5.0f);
  CHECK_EQ(out[1], 1099511627776.0f);
  char s[2] = "a";
  rc_array str = {{RC_DTYPE_STRING, 1, {1}, s}, NULL};
  CHECK_INT(rc_data_to_float(out, &str, 0, 1, NULL, &e), RC_ERR_UNSUPPORTED);
}

static void shape_fitting(void) {
  uint8_t px[2 * 784] = {0};
  rc_err e = {0};
  rc_array a = {{RC_DTYPE_UINT8, 3, {2, 28, 28}, px}, NULL};
  rc_tensor chw = {RC_DTYPE_FLOAT, 3, {1, 28, 28}, NULL};
  CHECK_INT(rc_data_fit(&a, &chw, &e), RC_OK);
  CHECK_EQ(a.t.rank, 4);
  CHECK_EQ(a.t.dims[0], 2);
  CHECK_EQ(a.t.dims[1], 1);
  CHECK_EQ(a.t.dims[2], 28);
  CHECK_INT(rc_data_fit(&a, &chw, &e), RC_OK); /* exact match now */
  rc_tensor hw = {RC_DTYPE_FLOAT, 2, {28, 28}, NULL};
  CHECK_INT(rc_data_fit(&a, &hw, &e), RC_OK);
  CHECK_EQ(a.t.rank, 3);
  CHECK_EQ(a.t.dims[2], 28);
  rc_tensor rgb = {RC_DTYPE_FLOAT, 3, {3, 28, 28}, NULL};
  CHECK_INT(rc_data_fit(&a, &rgb, &e), RC_ERR_SHAPE);
  CHECK_STR_CONTAINS(e.msg, "(28, 28)");
  CHECK_STR_CONTAINS(e.msg, "(3, 28, 28)");
  rc_tensor flat = {RC_DTYPE_FLOAT, 1, {784}, NULL};
  CHECK_INT(rc_data_fit(&a, &flat, &e), RC_ERR_SHAPE); /* same count, other layout */
  rc_tensor unknown = {RC_DTYPE_FLOAT, 3, {1, -1, 28}, NULL};
  CHECK_INT(rc_data_fit(&a, &unknown, &e), RC_ERR_INVALID);
  CHECK_EQ(a.t.rank, 3);
  CHECK_EQ(a.t.dims[1], 28);
  /* Labels-like (N) data fits a (1) model input and back. */
  rc_array v = {{RC_DTYPE_FLOAT, 1, {5}, px}, NULL};
  rc_tensor one = {RC_DTYPE_FLOAT, 1, {1}, NULL};
  CHECK_INT(rc_data_fit(&v, &one, &e), RC_OK);
  CHECK_EQ(v.t.rank, 2);
  CHECK_EQ(v.t.dims[1], 1);
}

static void label_checks(void) {
  rc_err e = {0};
  int64_t l64[5] = {0, 9, 3, 3, 1};
  rc_array a = {{RC_DTYPE_INT64, 1, {5}, l64}, NULL};
  CHECK_INT(rc_labels_check(&a, 5, 10, &e), RC_OK);
  CHECK_INT(rc_labels_check(&a, 6, 10, &e), RC_ERR_SHAPE);
  CHECK_STR_CONTAINS(e.msg, "5 labels for 6 samples");
  CHECK_INT(rc_labels_check(&a, 5, 9, &e), RC_ERR_INVALID);
  CHECK_STR_CONTAINS(e.msg, "position 1 is 9, outside 0..8");
  l64[4] = -1;
  CHECK_INT(rc_labels_check(&a, 5, 10, &e), RC_ERR_INVALID);
  CHECK_STR_CONTAINS(e.msg, "position 4 is -1");
  float lf[4] = {1, 0, 2, 1};
  rc_array f = {{RC_DTYPE_FLOAT, 2, {4, 1}, lf}, NULL};
  rc_array out;
  CHECK_INT(rc_labels_to_int32(&out, &f, 4, 3, &e), RC_OK);
  CHECK_EQ(out.t.dtype, RC_DTYPE_INT32);
  CHECK_EQ(out.t.rank, 1);
  CHECK_EQ(out.t.dims[0], 4);
  CHECK_EQ(((int32_t *)out.t.data)[2], 2);
  CHECK_EQ(((int32_t *)out.t.data)[3], 1);
  rc_array_free(&out);
  lf[3] = 1.5f;
  CHECK_INT(rc_labels_check(&f, 4, 3, &e), RC_ERR_INVALID);
  CHECK_STR_CONTAINS(e.msg, "position 3 is 1.5, not a whole number");
  lf[3] = NAN;
  CHECK_INT(rc_labels_check(&f, 4, 3, &e), RC_ERR_INVALID);
  rc_array two = {{RC_DTYPE_FLOAT, 2, {2, 2}, lf}, NULL};
  CHECK_INT(rc_labels_check(&two, 2, 3, &e), RC_ERR_SHAPE);
  CHECK_STR_CONTAINS(e.msg, "(2, 2)");
  uint8_t u[3] = {2, 0, 1};
  rc_array ua = {{RC_DTYPE_UINT8, 1, {3}, u}, NULL};
  CHECK_INT(rc_labels_to_int32(&out, &ua, 3, 3, &e), RC_OK);
  CHECK_EQ(((int32_t *)out.t.data)[0], 2);
  rc_array_free(&out);
}

/* ---- generator, batching, splits ---------------------------------------- */

static void pcg32_generator(void) {
  /* pcg32-demo from the reference implementation: seed 42, sequence 54
   * (values recalled from memory). */
  rc_rng r;
  rc__rng_seed(&r, 42u, 54u);
  const uint32_t want[6] = {0xa15c02b7u, 0x7b47f409u, 0xba1d3330u, 0x83d2f293u, 0xbfa4784bu, 0xcbed606eu};
  for (int i = 0; i < 6; i++) CHECK_INT(rc__rng_next32(&r), want[i]);
  /* Saved state continues the same sequence. */
  uint8_t st[RC_RNG_STATE_BYTES];
  rc__rng_save(st, &r);
  uint32_t next[4];
  for (int i = 0; i < 4; i++) next[i] = rc__rng_next32(&r);
  rc_rng q;
  rc_err e = {0};
  CHECK_INT(rc__rng_load(&q, st, &e), RC_OK);
  for (int i = 0; i < 4; i++) CHECK_INT(rc__rng_next32(&q), next[i]);
  st[8] &= 0xfe;
  CHECK_INT(rc__rng_load(&q, st, &e), RC_ERR_FORMAT);
  /* Uniformity of below(): chi-square over 10 buckets, 100000 draws
   * (self-chosen bound: 9 degrees of freedom, 99.9% quantile is 27.9). */
  rc__rng_seed(&r, 7, 1);
  long counts[10] = {0};
  for (int i = 0; i < 100000; i++) counts[rc__rng_below(&r, 10)]++;
  double chi = 0;
  for (int i = 0; i < 10; i++) chi += (counts[i] - 10000.0) * (counts[i] - 10000.0) / 10000.0;
  CHECK_LT(chi, 27.9);
  for (int i = 0; i < 1000; i++) {
    uint64_t v = rc__rng_below(&r, (1ULL << 40) + 3);
    CHECK_LT(v, (1ULL << 40) + 3);
    float u = rc__rng_uniform(&r);
    CHECK_GE(u, 0.0f);
    CHECK_LT(u, 1.0f);
  }
  /* Different streams differ. */
  rc_rng a, b;
  rc__rng_seed(&a, 1, 1);
  rc__rng_seed(&b, 1, 2);
  int same = 0;
  for (int i = 0; i < 8; i++) same += rc__rng_next32(&a) == rc__rng_next32(&b);
  CHECK_LT(same, 8);
}

static void dataset_batches(void) {
  enum { N = 23 };
  float x[N * 2];
  uint8_t z[N * 3];
  int32_t lab[N];
  for (int i = 0; i < N; i++) {
    x[2 * i] = (float)i;
    x[2 * i + 1] = (float)-i;
    for (int k = 0; k < 3; k++) z[3 * i + k] = (uint8_t)(i * 3 + k);
    lab[i] = i % 5;
  }
  rc_tensor ins[2] = {{RC_DTYPE_FLOAT, 2, {N, 2}, x}, {RC_DTYPE_UINT8, 3, {N, 3, 1}, z}};
  rc_tensor labels = {RC_DTYPE_INT32, 1, {N}, lab};
  rc_dataset d;
  rc_err e = {0};
  CHECK_INT(rc_dataset_init(&d, ins, 2, &labels, NULL, 0, &e), RC_OK);
  CHECK_INT(rc_dataset_n_batches(&d, 5, 0), 5);
  CHECK_INT(rc_dataset_n_batches(&d, 5, 1), 4);
  float bx[5 * 2];
  uint8_t bz[5 * 3];
  int32_t bl[5];
  void *outs[2] = {bx, bz};
  int64_t first_epoch[N];
  for (int epoch = 0; epoch < 2; epoch++) {
    rc_dataset_shuffle(&d, 1234, (uint64_t)epoch);
    int seen[N] = {0}, pos = 0, in_order = 1;
    rc_alloc_set_fail_after(0);
    for (int64_t bi = 0; bi < rc_dataset_n_batches(&d, 5, 0); bi++) {
      int64_t count;
      CHECK_INT(rc_dataset_gather(outs, bl, &count, &d, bi, 5, &e), RC_OK);
      CHECK_INT(count, bi == 4 ? 3 : 5);
      for (int64_t j = 0; j < count; j++) {
        int s = (int)bx[2 * j];
        CHECK_GE(s, 0);
        CHECK_LT(s, N);
        if (s < 0 || s >= N) continue;
        seen[s]++;
        CHECK_EQ(bx[2 * j + 1], (float)-s);
        CHECK_EQ(bz[3 * j], s * 3);
        CHECK_EQ(bz[3 * j + 2], s * 3 + 2);
        CHECK_INT(bl[j], s % 5);
        if (epoch == 0) first_epoch[pos] = s;
        else in_order &= first_epoch[pos] == s;
        in_order &= epoch == 1 || s == pos;
        pos++;
      }
    }
    CHECK_INT(rc_alloc_set_fail_after(0), 0); /* gathering allocated nothing */
    for (int i = 0; i < N; i++) CHECK_INT(seen[i], 1);
    CHECK(!in_order); /* shuffled, and epochs differ */
  }
  /* The order is a function of (seed, epoch) only. */
  rc_dataset_shuffle(&d, 1234, 0);
  int64_t count;
  CHECK_INT(rc_dataset_gather(outs, NULL, &count, &d, 0, 5, &e), RC_OK);
  for (int j = 0; j < 5; j++) CHECK_INT((int)bx[2 * j], first_epoch[j]);
  rc_dataset_unshuffle(&d);
  CHECK_INT(rc_dataset_gather(outs, NULL, &count, &d, 1, 5, &e), RC_OK);
  CHECK_EQ(bx[0], 5.0f);
  CHECK_INT(rc_dataset_gather(outs, bl, &count, &d, 5, 5, &e), RC_ERR_INVALID);
  CHECK_INT(rc_dataset_gather(outs, bl, &count, &d, -1, 5, &e), RC_ERR_INVALID);
  rc_dataset_free(&d);
  /* Index views and their checks. */
  int64_t idx[3] = {22, 0, 7};
  CHECK_INT(rc_dataset_init(&d, ins, 2, NULL, idx, 3, &e), RC_OK);
  CHECK_INT(rc_dataset_gather(outs, NULL, &count, &d, 0, 5, &e), RC_OK);
  CHECK_EQ(count, 3);
  CHECK_EQ(bx[0], 22.0f);
  CHECK_EQ(bx[2], 0.0f);
  CHECK_EQ(bx[4], 7.0f);
  CHECK_INT(rc_dataset_gather(outs, bl, &count, &d, 0, 5, &e), RC_ERR_INVALID); /* no labels */
  rc_dataset_free(&d);
  idx[1] = N;
  CHECK_INT(rc_dataset_init(&d, ins, 2, NULL, idx, 3, &e), RC_ERR_INVALID);
  CHECK_STR_CONTAINS(e.msg, "index entry 1");
  ins[1].dims[0] = N - 1;
  CHECK_INT(rc_dataset_init(&d, ins, 2, NULL, NULL, 0, &e), RC_ERR_SHAPE);
  ins[1].dims[0] = N;
  labels.dims[0] = N + 1;
  CHECK_INT(rc_dataset_init(&d, ins, 2, &labels, NULL, 0, &e), RC_ERR_SHAPE);
}

static void validation_split(void) {
  rc_data_split s, t;
  rc_err e = {0};
  CHECK_INT(rc_data_split_init(&s, 100, 0.2, 99, &e), RC_OK);
  CHECK_EQ(s.n_train, 80);
  CHECK_EQ(s.n_val, 20);
  int mark[100] = {0};
  for (int64_t i = 0; i < s.n_train; i++) mark[s.train[i]] += 1;
  for (int64_t i = 0; i < s.n_val; i++) mark[s.val[i]] += 2;
  for (int i = 0; i < 100; i++) { /* disjoint, complete */
    CHECK_GE(mark[i], 1);
    CHECK_LE(mark[i], 2);
  }
  for (int64_t i = 1; i < s.n_val; i++) CHECK_LT(s.val[i - 1], s.val[i]);
  int64_t tail = 0;
  for (int64_t i = 0; i < s.n_val; i++) tail += s.val[i] >= 80;
  CHECK_LT(tail, 20); /* a random subset, not simply the last samples */
  CHECK_INT(rc_data_split_init(&t, 100, 0.2, 99, &e), RC_OK);
  CHECK_MEM_EQ(s.val, t.val, 20 * sizeof(int64_t));
  rc_data_split_free(&t);
  CHECK_INT(rc_data_split_init(&t, 100, 0.2, 100, &e), RC_OK);
  CHECK_MEM_NE(s.val, t.val, 20 * sizeof(int64_t));
  rc_data_split_free(&t);
  rc_data_split_free(&s);
  CHECK_INT(rc_data_split_init(&s, 10, 0.0, 1, &e), RC_OK);
  CHECK_EQ(s.n_train, 10);
  CHECK_EQ(s.n_val, 0);
  rc_data_split_free(&s);
  CHECK_INT(rc_data_split_init(&s, 10, 0.01, 1, &e), RC_OK);
  CHECK_EQ(s.n_train, 9);
  CHECK_EQ(s.n_val, 1);
  rc_data_split_free(&s);
  CHECK_INT(rc_data_split_init(&s, 10, 0.99, 1, &e), RC_ERR_INVALID);
  CHECK_STR_CONTAINS(e.msg, "no training samples");
  CHECK_INT(rc_data_split_init(&s, 10, -0.5, 1, &e), RC_ERR_INVALID);
  CHECK_INT(rc_data_split_init(&s, 10, NAN, 1, &e), RC_ERR_INVALID);
}

static void make_tmpdir(void) {
  const char *base = getenv("RECOUP_BINARY_DIR");
  snprintf(tmpdir, sizeof tmpdir, "%s/test_data.XXXXXX", base && *base ? base : "/tmp");
  if (!mkdtemp(tmpdir)) {
    perror(tmpdir);
    exit(2);
  }
}

static void remove_tmpdir(void) {
  char cmd[600];
  snprintf(cmd, sizeof cmd, "rm -rf '%s'", tmpdir);
  if (system(cmd) != 0) fprintf(stderr, "could not remove %s\n", tmpdir);
}

int main(int argc, char **argv) {
  TEST_SELECT(argc, argv);
  make_tmpdir();
  RUN(npy_versions_and_dtypes);
  RUN(npy_header_grammar);
  RUN(npy_corrupt_files);
  RUN(detection_and_plain_errors);
  RUN(npz_members);
  RUN(npz_corrupt_files);
  RUN(npz_and_gzip_out_of_memory);
  RUN(random_damage);
  RUN(idx_types);
  RUN(idx_corrupt_and_bombs);
  RUN_ALONE(fashion_mnist_files);
  RUN(parse_float_lists);
  RUN(float_conversion);
  RUN(shape_fitting);
  RUN(label_checks);
  RUN(pcg32_generator);
  RUN(dataset_batches);
  RUN(validation_split);
  remove_tmpdir();
  return TEST_REPORT();
}
