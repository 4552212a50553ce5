/* Data readers against files written by NumPy (Debian python3-numpy) through
 * scripts/ref_data_files.py: np.save (format 1.0), np.lib.format.write_array
 * (2.0, 3.0), np.savez (stored zip with zip64 local headers),
 * np.savez_compressed (deflated), and gzipped IDX files. Each array follows
 * a formula stated in the script, recomputed here. TensorProto .pb files
 * come from the onnx package (Debian python3-onnx). */
#include <stdint.h>
#include <stdlib.h>

#include "recoup/data.h"
#include "test.h"

static char dir[600];

static const char *ref(const char *name) {
  static char path[700];
  snprintf(path, sizeof path, "%s/%s", dir, name);
  return path;
}

static int read_ok(rc_array *a, const char *name, const char *member) {
  rc_err e = {0};
  rc_status st = rc_array_read(a, ref(name), member, 0, &e);
  if (st != RC_OK) fprintf(stderr, "%s\n", e.msg);
  CHECK_INT(st, RC_OK);
  return st == RC_OK;
}

static void npy_format_versions(void) {
  rc_array a;
  /* Source: NumPy (Debian python3-numpy), np.save, format 1.0. */
  if (read_ok(&a, "v1_f4.npy", NULL)) {
    CHECK_EQ(a.t.dtype, RC_DTYPE_FLOAT);
    CHECK_EQ(a.t.rank, 3);
    CHECK_EQ(a.t.dims[0], 2);
    CHECK_EQ(a.t.dims[1], 3);
    CHECK_EQ(a.t.dims[2], 4);
    for (int i = 0; i < 24; i++) CHECK_NEAR(((float *)a.t.data)[i], (i - 5) * 0.25, 0, 0);
    rc_array_free(&a);
  }
  /* Source: NumPy (Debian python3-numpy), write_array version (2, 0). */
  if (read_ok(&a, "v2_i2.npy", NULL)) {
    CHECK_EQ(a.t.dtype, RC_DTYPE_INT16);
    CHECK_EQ(a.t.rank, 2);
    CHECK_EQ(a.t.dims[0], 3);
    CHECK_EQ(a.t.dims[1], 4);
    for (int i = 0; i < 12; i++) CHECK_INT(((int16_t *)a.t.data)[i], i - 6);
    rc_array_free(&a);
  }
  /* Source: NumPy (Debian python3-numpy), write_array version (3, 0). */
  if (read_ok(&a, "v3_u1.npy", NULL)) {
    CHECK_EQ(a.t.dtype, RC_DTYPE_UINT8);
    CHECK_EQ(a.t.rank, 1);
    CHECK_EQ(a.t.dims[0], 10);
    for (int i = 0; i < 10; i++) CHECK_INT(((uint8_t *)a.t.data)[i], i * 25);
    rc_array_free(&a);
  }
  /* Source: NumPy (Debian python3-numpy), np.save of a 0-d float64. */
  if (read_ok(&a, "scalar_f8.npy", NULL)) {
    CHECK_EQ(a.t.dtype, RC_DTYPE_DOUBLE);
    CHECK_EQ(a.t.rank, 0);
    CHECK_EQ(*(double *)a.t.data, 3.5);
    rc_array_free(&a);
  }
}

static void npz_every_dtype(void) {
  static const int signed_v[8] = {-3, -2, -1, 0, 1, 2, 3, 100};
  static const int unsigned_v[8] = {0, 1, 2, 3, 4, 5, 6, 200};
  struct {
    const char *member;
    rc_dtype dt;
  } m[] = {{"b1", RC_DTYPE_BOOL},   {"i1", RC_DTYPE_INT8},   {"i2", RC_DTYPE_INT16},
           {"i4", RC_DTYPE_INT32},  {"i8", RC_DTYPE_INT64},  {"u1", RC_DTYPE_UINT8},
           {"u2", RC_DTYPE_UINT16}, {"f4", RC_DTYPE_FLOAT},  {"f8", RC_DTYPE_DOUBLE}};
  rc_err e = {0};
  char **names;
  int count;
  /* Source: NumPy (Debian python3-numpy), np.savez member order. */
  CHECK_INT(rc_npz_list(&names, &count, ref("dtypes.npz"), &e), RC_OK);
  CHECK_INT(count, 9);
  if (count == 9) { CHECK_STR_EQ(names[0], "b1.npy"); CHECK_STR_EQ(names[8], "f8.npy"); }
  rc_data_names_free(names);
  for (size_t k = 0; k < sizeof m / sizeof *m; k++) {
    rc_array a;
    if (!read_ok(&a, "dtypes.npz", m[k].member)) continue;
    /* Source: NumPy (Debian python3-numpy), np.savez, values per the script. */
    CHECK_INT(a.t.dtype, m[k].dt);
    CHECK_EQ(a.t.rank, 1);
    CHECK_EQ(a.t.dims[0], 8);
    float f[8];
    CHECK_INT(rc_data_to_float(f, &a, 0, 8, NULL, &e), RC_OK);
    for (int i = 0; i < 8; i++) {
      double want = m[k].dt == RC_DTYPE_BOOL ? (i % 3 == 0)
                    : m[k].member[0] == 'u' ? unsigned_v[i]
                    : m[k].member[0] == 'f' ? signed_v[i] * 0.5
                                            : signed_v[i];
      CHECK_NEAR(f[i], want, 0, 0);
    }
    rc_array_free(&a);
  }
}

static void npz_compressed(void) {
  rc_array x, y, yf, y32;
  rc_err e = {0};
  /* Source: NumPy (Debian python3-numpy), np.savez_compressed (deflate). */
  if (read_ok(&x, "compressed.npz", "x")) {
    CHECK_EQ(x.t.dtype, RC_DTYPE_DOUBLE);
    CHECK_EQ(x.t.rank, 2);
    CHECK_EQ(x.t.dims[0], 30);
    CHECK_EQ(x.t.dims[1], 100);
    for (int i = 0; i < 3000; i++) CHECK_NEAR(((double *)x.t.data)[i], (i % 17) * 0.125, 0, 0);
    rc_array_free(&x);
  }
  if (read_ok(&y, "compressed.npz", "y.npy")) {
    CHECK_EQ(y.t.dtype, RC_DTYPE_INT64);
    CHECK_EQ(y.t.dims[0], 30);
    CHECK_INT(rc_labels_to_int32(&y32, &y, 30, 10, &e), RC_OK);
    for (int i = 0; i < 30 && y32.t.data; i++) CHECK_INT(((int32_t *)y32.t.data)[i], i % 10);
    rc_array_free(&y32);
    rc_array_free(&y);
  }
  /* Float labels of shape (N, 1). */
  if (read_ok(&yf, "compressed.npz", "yf")) {
    CHECK_EQ(yf.t.dtype, RC_DTYPE_FLOAT);
    CHECK_EQ(yf.t.rank, 2);
    CHECK_EQ(yf.t.dims[1], 1);
    CHECK_INT(rc_labels_to_int32(&y32, &yf, 30, 10, &e), RC_OK);
    if (y32.t.data) CHECK_INT(((int32_t *)y32.t.data)[29], 9);
    rc_array_free(&y32);
    rc_array_free(&yf);
  }
}

static void refused_layouts(void) {
  rc_array a;
  rc_err e = {0};
  /* Source: NumPy (Debian python3-numpy) writes these with fortran_order True,
   * descr '|O' (pickle) and '>f4'; each is refused with its reason. */
  CHECK_INT(rc_array_read(&a, ref("fortran.npy"), NULL, 0, &e), RC_ERR_UNSUPPORTED);
  CHECK_STR_CONTAINS(e.msg, "fortran.npy: array is in Fortran");
  CHECK_INT(rc_array_read(&a, ref("object.npy"), NULL, 0, &e), RC_ERR_UNSUPPORTED);
  CHECK_STR_CONTAINS(e.msg, "pickled");
  CHECK_INT(rc_array_read(&a, ref("big_endian.npy"), NULL, 0, &e), RC_ERR_UNSUPPORTED);
  CHECK_STR_CONTAINS(e.msg, "big-endian");
}

static void idx_gzip(void) {
  rc_array a;
  /* Source: IDX written by the script (Python struct + gzip, NumPy '>' dtypes). */
  if (read_ok(&a, "images-idx3-ubyte.gz", NULL)) {
    CHECK_EQ(a.t.dtype, RC_DTYPE_UINT8);
    CHECK_EQ(a.t.rank, 3);
    CHECK_EQ(a.t.dims[0], 4);
    CHECK_EQ(a.t.dims[1], 5);
    CHECK_EQ(a.t.dims[2], 6);
    for (int i = 0; i < 120; i++) CHECK_INT(((uint8_t *)a.t.data)[i], (i * 7) % 256);
    rc_array_free(&a);
  }
  if (read_ok(&a, "floats-idx2.gz", NULL)) {
    CHECK_EQ(a.t.dtype, RC_DTYPE_FLOAT);
    CHECK_EQ(a.t.rank, 2);
    CHECK_EQ(a.t.dims[0], 3);
    CHECK_EQ(a.t.dims[1], 4);
    for (int i = 0; i < 12; i++) CHECK_NEAR(((float *)a.t.data)[i], i * 0.5 - 1, 0, 0);
    rc_array_free(&a);
  }
}

static void tensorproto_files(void) {
  rc_array a;
  /* Source: onnx (Debian python3-onnx), numpy_helper.from_array: raw_data. */
  if (read_ok(&a, "raw_f4.pb", NULL)) {
    CHECK_EQ(a.t.dtype, RC_DTYPE_FLOAT);
    CHECK_EQ(a.t.rank, 2);
    CHECK_EQ(a.t.dims[0], 2);
    CHECK_EQ(a.t.dims[1], 3);
    for (int i = 0; i < 6; i++) CHECK_NEAR(((float *)a.t.data)[i], i * 1.5 - 2, 0, 0);
    rc_array_free(&a);
  }
  /* Source: onnx (Debian python3-onnx), helper.make_tensor: int64_data. */
  if (read_ok(&a, "typed_i64.pb", NULL)) {
    CHECK_EQ(a.t.dtype, RC_DTYPE_INT64);
    CHECK_EQ(a.t.rank, 1);
    CHECK_EQ(a.t.dims[0], 4);
    const int64_t want[4] = {-7, 0, 9, 1LL << 40};
    for (int i = 0; i < 4; i++) CHECK_INT(((int64_t *)a.t.data)[i], want[i]);
    rc_array_free(&a);
  }
}

int main(void) {
  const char *bin = getenv("RECOUP_BINARY_DIR");
  if (!bin) {
    fprintf(stderr, "RECOUP_BINARY_DIR is not set: run through ctest (fixture data_ref_files)\n");
    return 1;
  }
  snprintf(dir, sizeof dir, "%s/data_ref", bin);
  RUN(npy_format_versions);
  RUN(npz_every_dtype);
  RUN(npz_compressed);
  RUN(refused_layouts);
  RUN(idx_gzip);
  RUN(tensorproto_files);
  return TEST_REPORT();
}
