/* Training through the 1x1 batched matmul (src/ops/conv_dnnl_1x1.c) on a
 * network made mostly of 1x1 layers: torchvision's mobilenet_v2 (width 1,
 * 3x64x64, BatchNormalization kept) as exported by the reference_models
 * fixture, distilled from itself with the student's BatchNormalization in
 * training mode (so the two differ and the weights move). Fashion-MNIST
 * training images (Debian's dataset-fashion-mnist), scaled to [0, 1] and
 * enlarged to 64x64 by repeating pixels (nearest neighbour) into three
 * channels, are the inputs. Checks:
 * - steady-state steps allocate nothing: the library's allocation counter
 *   (rc_alloc_set_fail_after) read at steps 10 and 60 must not move;
 * - determinism: two runs with the same seed and threads write
 *   byte-identical students.
 * In builds with oneDNN the default Conv path gives the 1x1 layers of 16 to
 * 1023 map cells to the matmul; RECOUP_CONV_PATH=builtin (ctest's _builtin
 * entry) runs the same checks on recoup's own GEMMs. */
#define _POSIX_C_SOURCE 200112L
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "core/alloc.h"
#include "onnx/model.h"
#include "recoup/alloc.h"
#include "recoup/data.h"
#include "step_allocs.h"
#include "test.h"
#include "train/distill.h"

#define SIDE 64
#define IMAGES 320 /* 288 training after the 10% hold-out: 72 steps of 4 per epoch */

/* x (IMAGES, 3, 64, 64) from the 28x28 images of raw, nearest neighbour. */
static float *enlarge(const rc_array *raw) {
  const int64_t src = raw->t.dims[1];
  const uint8_t *in = raw->t.data;
  float *x = malloc(sizeof(float) * (size_t)IMAGES * 3 * SIDE * SIDE);
  if (!x) return NULL;
  for (int64_t n = 0; n < IMAGES; n++)
    for (int64_t c = 0; c < 3; c++)
      for (int64_t i = 0; i < SIDE; i++)
        for (int64_t j = 0; j < SIDE; j++)
          x[((n * 3 + c) * SIDE + i) * SIDE + j] =
              in[(n * src + i * src / SIDE) * src + j * src / SIDE] * (1.0f / 255.0f);
  return x;
}

/* One run, its student written to out_path; returns the allocations counted. */
static long run_once(const char *model_path, const rc_tensor *x, const char *out_path) {
  rc_err e = {0};
  rc_model *teacher = NULL, *student = NULL;
  long allocations = -1;
  CHECK_INT(rc_model_load(&teacher, model_path, NULL, &e), RC_OK);
  CHECK_INT(rc_model_load(&student, model_path, NULL, &e), RC_OK);
  if (!teacher || !student) {
    fprintf(stderr, "%s: %s\n", model_path, e.msg);
    goto out;
  }
  rc_distill_config c;
  rc_distill_config_defaults(&c);
  c.steps = LAST_STEP + 5;
  c.batch = 4;
  c.bn = RC_BN_TRAIN;
  step_counts counts = {0};
  c.progress = count_at_steps;
  c.user = &counts;
  rc_distill_data d = {x, 1, NULL, NULL, NULL, 0.1};
  rc_distill_result r = {0};
  const rc_status st = rc_distill_run(&r, teacher, student, &d, &c, &e);
  rc_alloc_set_fail_after(0);
  if (st != RC_OK) fprintf(stderr, "distill: %s\n", e.msg);
  CHECK_INT(st, RC_OK);
  CHECK(counts.seen_first && counts.seen_last);
  if (st == RC_OK) {
    allocations = counts.allocations;
    CHECK_INT(rc_distill_save(&r, student, out_path, &d, &e), RC_OK);
  }
  rc_distill_result_free(&r);
out:
  rc_model_free(teacher);
  rc_model_free(student);
  return allocations;
}

static uint8_t *slurp(const char *path, size_t *n) {
  FILE *f = fopen(path, "rb");
  if (!f) return NULL;
  fseek(f, 0, SEEK_END);
  *n = (size_t)ftell(f);
  fseek(f, 0, SEEK_SET);
  uint8_t *b = malloc(*n ? *n : 1);
  if (b && fread(b, 1, *n, f) != *n) free(b), b = NULL;
  fclose(f);
  return b;
}

static void pointwise_steady_and_deterministic(void) {
  const char *bin = getenv("RECOUP_BINARY_DIR");
  char model[4096], out_a[4096], out_b[4096];
  snprintf(model, sizeof model, "%s/reference/mobilenet_v2_op17_bn/model.onnx", bin ? bin : ".");
  /* Named by process: ctest runs this entry and its _builtin twin side by
   * side, and a shared name let one remove or overwrite the other's file. */
  snprintf(out_a, sizeof out_a, "%s/pointwise_%ld_a.onnx", bin ? bin : ".", (long)getpid());
  snprintf(out_b, sizeof out_b, "%s/pointwise_%ld_b.onnx", bin ? bin : ".", (long)getpid());
  rc_err e = {0};
  rc_array raw = {0};
  CHECK_INT(rc_array_read(&raw, "/usr/share/datasets/fashion-mnist/train-images-idx3-ubyte.gz", NULL,
                          RC_DATA_DEFAULT_MAX_BYTES, &e),
            RC_OK);
  float *data = raw.t.data ? enlarge(&raw) : NULL;
  CHECK_NOT_NULL(data);
  if (!data) goto out;
  rc_tensor x = {RC_DTYPE_FLOAT, 4, {IMAGES, 3, SIDE, SIDE}, data};
  const long first = run_once(model, &x, out_a);
  if (getenv("RECOUP_SANITIZER_BUILD")) {
    /* The sanitizers watch one run's memory use; two runs writing the same
     * bytes is the release build's check (a second run here cost a minute). */
    printf("allocations in steps %d..%d: %ld (expected 0); one run in the sanitizer build\n", FIRST_STEP + 1,
           LAST_STEP, first);
    CHECK_INT(first, 0);
    remove(out_a);
    goto out;
  }
  const long second = run_once(model, &x, out_b);
  printf("allocations in steps %d..%d: first run %ld, second run %ld (expected 0)\n", FIRST_STEP + 1, LAST_STEP,
         first, second);
  CHECK_INT(first, 0);
  CHECK_INT(second, 0);
  size_t na = 0, nb = 0;
  uint8_t *a = slurp(out_a, &na), *b = slurp(out_b, &nb);
  printf("students written: %zu and %zu bytes, %s\n", na, nb,
         a && b && na == nb && !memcmp(a, b, na) ? "identical" : "different");
  CHECK(a && b);
  CHECK_EQ(na, nb);
  if (a && b && na == nb) CHECK_MEM_EQ(a, b, na);
  free(a);
  free(b);
  remove(out_a);
  remove(out_b);
out:
  free(data);
  rc_array_free(&raw);
}

int main(void) {
  RUN(pointwise_steady_and_deterministic);
  return TEST_REPORT();
}
