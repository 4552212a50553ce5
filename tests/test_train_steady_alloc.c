/* Steady-state training allocates nothing: every buffer a step needs belongs
 * to the plans and the step's own buffers, made before the first step. The
 * library's allocation counter (rc_alloc_set_fail_after, which counts every
 * rc__malloc/calloc/realloc) is read at step 10 and at step 60 of a run on
 * the bundled garment pair with Fashion-MNIST training images (Debian's
 * dataset-fashion-mnist): the 50 steps between must make no allocation, in
 * frozen and in training BatchNormalization mode, and with a 2:4 student
 * (the dense model pruned in memory) on the N:M kernels
 * (RECOUP_CONV_PATH=nm-on; skipped when a run sets another path). */
#define _POSIX_C_SOURCE 200112L
#include <stdint.h>
#include <stdlib.h>

#include "compress/prune.h"
#include "core/alloc.h"
#include "onnx/model.h"
#include "plan/load.h"
#include "recoup/alloc.h"
#include "recoup/data.h"
#include "step_allocs.h"
#include "test.h"
#include "train/distill.h"


static char *source_path(char *buf, size_t n, const char *rel) {
  const char *root = getenv("RECOUP_SOURCE_DIR");
  snprintf(buf, n, "%s/%s", root ? root : ".", rel);
  return buf;
}

/* two_of_four: the student is the dense model pruned 2:4 here. */
static void run_steps(rc_bn_mode bn, int two_of_four) {
  char tpath[4096], spath[4096];
  rc_err e = {0};
  rc_model *teacher = NULL, *student = NULL;
  rc_array raw = {0}, x = {0};
  CHECK(rc_model_load(&teacher, source_path(tpath, sizeof tpath, "models/garment_dense.onnx"), NULL, &e) == RC_OK);
  CHECK(rc_model_load(&student,
                      source_path(spath, sizeof spath,
                                  two_of_four ? "models/garment_dense.onnx" : "models/garment_pruned90.onnx"),
                      NULL, &e) == RC_OK);
  if (two_of_four && student) {
    rc_prune_opts o;
    rc_prune_opts_init(&o);
    o.nm_n = 2, o.nm_m = 4;
    rc_prune_report rep;
    int *changed = NULL, n_changed = 0;
    CHECK(rc_prune_model(student, &o, &rep, &changed, &n_changed, &e) == RC_OK);
    CHECK(n_changed > 0);
    rc__free(changed);
    rc_prune_report_free(&rep);
  }
  CHECK(rc_array_read(&raw, "/usr/share/datasets/fashion-mnist/train-images-idx3-ubyte.gz", NULL,
                      RC_DATA_DEFAULT_MAX_BYTES, &e) == RC_OK);
  if (!teacher || !student || !raw.t.data) {
    fprintf(stderr, "set-up failed: %s\n", e.msg);
    goto out;
  }
  /* 1,280 images as (N, 1, 28, 28) in [0, 1]: 72 steps of 16 per epoch after
   * the 10% validation hold-out, so no epoch ends inside the counted span. */
  raw.t.rank = 4;
  raw.t.dims[0] = 1280;
  raw.t.dims[3] = raw.t.dims[2];
  raw.t.dims[2] = raw.t.dims[1];
  raw.t.dims[1] = 1;
  rc_data_norm norm;
  rc_data_norm_identity(&norm);
  norm.scale = 1.0f / 255.0f;
  CHECK(rc_data_to_float_array(&x, &raw, &norm, &e) == RC_OK);
  rc_distill_config c;
  rc_distill_config_defaults(&c);
  c.steps = LAST_STEP + 5;
  c.batch = 16;
  c.bn = bn;
  step_counts counts = {0};
  c.progress = count_at_steps;
  c.user = &counts;
  rc_distill_data d = {&x.t, 1, NULL, NULL, NULL, 0.1};
  rc_distill_result r = {0};
  CHECK(rc_distill_run(&r, teacher, student, &d, &c, &e) == RC_OK);
  rc_alloc_set_fail_after(0);
  printf("bn mode %d, %s: %ld allocations in steps %d..%d (expected 0)\n", (int)bn,
         two_of_four ? "2:4 student" : "90% student", counts.allocations, FIRST_STEP + 1, LAST_STEP);
  CHECK(counts.seen_first && counts.seen_last);
  CHECK_INT(counts.allocations, 0);
  rc_distill_result_free(&r);
out:
  rc_array_free(&x);
  rc_array_free(&raw);
  rc_model_free(teacher);
  rc_model_free(student);
}

static void steady_state_frozen_bn(void) { run_steps(RC_BN_FROZEN, 0); }
static void steady_state_training_bn(void) { run_steps(RC_BN_TRAIN, 0); }
static void steady_state_nm_kernels(void) {
  if (getenv("RECOUP_CONV_PATH")) {
    printf("skipped: RECOUP_CONV_PATH is set by this run\n");
    return;
  }
  setenv("RECOUP_CONV_PATH", "nm-on", 1);
  run_steps(RC_BN_TRAIN, 1);
  unsetenv("RECOUP_CONV_PATH");
}

int main(void) {
  RUN(steady_state_frozen_bn);
  RUN(steady_state_training_bn);
  RUN(steady_state_nm_kernels);
  return TEST_REPORT();
}
