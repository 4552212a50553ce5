/* Named float32 arrays written by a reference script (scripts/ref_*.py run
 * with Debian's python3 and python3-torch) into $RECOUP_BINARY_DIR/<dir>:
 * index.txt holds one "<name> <count>" line per array, <name>.f32 its raw
 * little-endian float32 values. Include after test.h. */
#ifndef RC_TEST_REF_ARRAYS_H
#define RC_TEST_REF_ARRAYS_H

#ifndef REF_MAX_ARRAYS
#define REF_MAX_ARRAYS 128
#endif

static struct {
  char name[64];
  long n;
  float *data;
} ref_arrays_[REF_MAX_ARRAYS];
static int ref_n_arrays_;

/* Read every array of the index in $RECOUP_BINARY_DIR/dir; 0 (with a message
 * naming the fixture) when the data is missing or unreadable. */
static int ref_load(const char *dir, const char *fixture) {
  const char *bin = getenv("RECOUP_BINARY_DIR");
  if (!bin) {
    fprintf(stderr, "RECOUP_BINARY_DIR is not set\n");
    return 0;
  }
  char path[4096];
  snprintf(path, sizeof path, "%s/%s/index.txt", bin, dir);
  FILE *idx = fopen(path, "r");
  if (!idx) {
    fprintf(stderr, "%s: cannot open (run the %s fixture through ctest)\n", path, fixture);
    return 0;
  }
  char name[64];
  long n;
  while (ref_n_arrays_ < REF_MAX_ARRAYS && fscanf(idx, "%63s %ld", name, &n) == 2) {
    if (n < 1 || n > 1000000) break;
    snprintf(path, sizeof path, "%s/%s/%s.f32", bin, dir, name);
    FILE *f = fopen(path, "rb");
    float *d = malloc((size_t)n * sizeof(float));
    int ok = f && d && fread(d, sizeof(float), (size_t)n, f) == (size_t)n;
    if (f) fclose(f);
    if (!ok) {
      fprintf(stderr, "%s: cannot read %ld floats\n", path, n);
      free(d);
      fclose(idx);
      return 0;
    }
    snprintf(ref_arrays_[ref_n_arrays_].name, sizeof ref_arrays_[ref_n_arrays_].name, "%s", name);
    ref_arrays_[ref_n_arrays_].n = n;
    ref_arrays_[ref_n_arrays_].data = d;
    ref_n_arrays_++;
  }
  fclose(idx);
  return ref_n_arrays_ > 0;
}

/* The array called name with exactly n floats; a failed check otherwise. */
static const float *ref(const char *name, long n) {
  for (int i = 0; i < ref_n_arrays_; i++)
    if (!strcmp(ref_arrays_[i].name, name)) {
      CHECK_INT(ref_arrays_[i].n, n);
      return ref_arrays_[i].n == n ? ref_arrays_[i].data : NULL;
    }
  fprintf(stderr, "reference array %s missing\n", name);
  CHECK(0);
  return NULL;
}

/* Gradients against a reference: relative 1e-4 plus 1e-6 of the largest
 * reference entry (for entries that cancel to near zero); the first three
 * misses are printed with both sides. A NULL reference is skipped (its
 * absence is already a failed check). */
static void ref_check_grad(const char *what, const float *got, const float *want, long n) {
  if (!want) return;
  double big = 0.0;
  for (long i = 0; i < n; i++)
    if (fabs(want[i]) > big) big = fabs(want[i]);
  int bad = 0;
  for (long i = 0; i < n; i++)
    if (!(fabs(got[i] - want[i]) <= 1e-4 * fabs(want[i]) + 1e-6 * big)) {
      if (bad++ < 3) fprintf(stderr, "%s[%ld]: recoup %.9g, PyTorch %.9g\n", what, i, got[i], want[i]);
    }
  CHECK_INT(bad, 0);
}

static void ref_free(void) {
  for (int i = 0; i < ref_n_arrays_; i++) free(ref_arrays_[i].data);
  ref_n_arrays_ = 0;
}

#endif
