/* A program built against the installed library through pkg-config
 * (tests/api.cmake): it distils the bundled pruned garment classifier
 * against its dense original on Fashion-MNIST (Debian's
 * dataset-fashion-mnist) for a few dozen steps and checks, on the 500
 * first test images, that the saved student reloads and agrees with the
 * teacher more often than the student it started from.
 *
 * Usage: api_example MODELS_DIR FASHION_MNIST_DIR OUT_DIR
 * Exit 0 pass, 1 fail, 77 skip (dataset missing). */
#include <stdint.h>
#include <stdio.h>
#include <string.h>

#include <recoup/recoup.h>

#define N_TRAIN 1200
#define N_TEST 500

static int fail(const char *what, const rc_err *e) {
  fprintf(stderr, "api_example: %s: %s\n", what, e->msg);
  return 1;
}

/* The first n images as float (n, 1, 28, 28) scaled to [0, 1], their labels as int32. */
static rc_status load_split(const char *dir, const char *prefix, int64_t n, const rc_model *m, rc_array *x,
                            rc_array *y, rc_err *e) {
  char path[1024];
  rc_array raw = {0}, raw_labels = {0};
  rc_model_io in;
  rc_status s = rc_model_input(m, 0, &in, e);
  snprintf(path, sizeof path, "%s/%s-images-idx3-ubyte.gz", dir, prefix);
  if (s == RC_OK) s = rc_array_read(&raw, path, NULL, 0, e);
  rc_tensor sample = in.shape; /* the sample shape: the input's dims after the batch */
  sample.rank = in.shape.rank - 1;
  for (int i = 0; i < sample.rank; i++) sample.dims[i] = in.shape.dims[i + 1];
  if (s == RC_OK) s = rc_data_fit(&raw, &sample, e);
  if (s == RC_OK && raw.t.dims[0] > n) raw.t.dims[0] = n; /* a view of the first n */
  rc_data_norm norm;
  rc_data_norm_identity(&norm);
  norm.scale = 1.0f / 255.0f;
  if (s == RC_OK) s = rc_data_to_float_array(x, &raw, &norm, e);
  snprintf(path, sizeof path, "%s/%s-labels-idx1-ubyte.gz", dir, prefix);
  if (s == RC_OK) s = rc_array_read(&raw_labels, path, NULL, 0, e);
  if (s == RC_OK && raw_labels.t.dims[0] > n) raw_labels.t.dims[0] = n;
  if (s == RC_OK) s = rc_labels_to_int32(y, &raw_labels, x->t.dims[0], 10, e);
  rc_array_free(&raw);
  rc_array_free(&raw_labels);
  return s;
}

static void on_progress(void *user, const rc_distill_progress *p) {
  int *epochs_seen = user;
  if (p->event == RC_DISTILL_EPOCH) {
    ++*epochs_seen;
    printf("  epoch %lld: loss %.4f, validation agreement %.2f%%\n", (long long)p->epoch, p->loss,
           100 * p->val.agreement);
  }
}

int main(int argc, char **argv) {
  if (argc != 4) {
    fprintf(stderr, "usage: api_example MODELS_DIR FASHION_MNIST_DIR OUT_DIR\n");
    return 2;
  }
  char probe[1024];
  snprintf(probe, sizeof probe, "%s/train-images-idx3-ubyte.gz", argv[2]);
  FILE *f = fopen(probe, "rb");
  if (!f) {
    printf("SKIP: %s not found (install dataset-fashion-mnist)\n", probe);
    return 77;
  }
  fclose(f);

  rc_err e = {0};
  char teacher_path[1024], student_path[1024], out_path[1024];
  snprintf(teacher_path, sizeof teacher_path, "%s/garment_dense.onnx", argv[1]);
  snprintf(student_path, sizeof student_path, "%s/garment_pruned90.onnx", argv[1]);
  snprintf(out_path, sizeof out_path, "%s/garment_recovered.onnx", argv[3]);
  rc_model *teacher = NULL, *student = NULL, *back = NULL;
  if (rc_model_load(&teacher, teacher_path, NULL, &e) != RC_OK) return fail("loading the teacher", &e);
  if (rc_model_load(&student, student_path, NULL, &e) != RC_OK) return fail("loading the student", &e);

  rc_model_summary sum;
  if (rc_model_summarize(student, &sum, &e) != RC_OK) return fail("summarising the student", &e);
  printf("student: %d nodes, %lld parameters, %lld MACs, %.1f%% of layer weights zero\n", sum.n_nodes,
         (long long)sum.params, (long long)sum.macs, 100.0 * (double)sum.weights_zero / (double)sum.weights_total);

  /* Under --mask auto every zero of a float layer weight is pruned: the
   * entries the masks keep at zero are the summary's zero weights. */
  rc_mask_choice *masks = NULL;
  int n_masks = 0;
  if (rc_model_masks(student, RC_MASK_AUTO, &masks, &n_masks, &e) != RC_OK) return fail("listing masks", &e);
  long long kept_zero = 0;
  for (int i = 0; i < n_masks; i++)
    if (masks[i].rule && masks[i].keep_zeros) kept_zero += masks[i].at_zero;
  rc_model_list_free(masks);
  printf("masks (auto): %lld entries kept at zero; summary: %lld zero layer weights\n", kept_zero,
         (long long)sum.weights_zero);

  rc_array train_x = {0}, train_y = {0}, test_x = {0}, test_y = {0};
  if (load_split(argv[2], "train", N_TRAIN, student, &train_x, &train_y, &e) != RC_OK) return fail("training data", &e);
  if (load_split(argv[2], "t10k", N_TEST, student, &test_x, &test_y, &e) != RC_OK) return fail("test data", &e);

  /* The first N_TEST test images, measured before and after. */
  rc_dataset test;
  if (rc_dataset_init(&test, &test_x.t, 1, &test_y.t, NULL, 0, &e) != RC_OK) return fail("test view", &e);
  rc_eval_settings es;
  rc_eval_settings_init(&es);
  rc_eval_result before, after;
  if (rc_eval_run(&before, student, teacher, &test, &es, &e) != RC_OK) return fail("evaluating the student", &e);

  rc_distill_data data = {.inputs = &train_x.t, .n_inputs = 1, .labels = train_y.t.data, .val_split = 0.25};
  rc_distill_settings s;
  rc_distill_settings_init(&s);
  s.steps = 30;
  s.batch = 32;
  int epochs_seen = 0;
  s.progress = on_progress;
  s.user = &epochs_seen;
  rc_distill_summary ds;
  if (rc_distill_train(&ds, teacher, student, &data, &s, &e) != RC_OK) return fail("distilling", &e);
  if (rc_distill_save(&ds, student, out_path, &data, &e) != RC_OK) return fail("saving", &e);
  if (rc_model_load(&back, out_path, NULL, &e) != RC_OK) return fail("reloading the saved student", &e);
  if (rc_eval_run(&after, back, teacher, &test, &es, &e) != RC_OK) return fail("evaluating the saved student", &e);

  printf("distilled %lld steps in %.1f s on %lld training samples (%lld held out), best epoch %lld\n",
         (long long)ds.steps_done, ds.seconds, (long long)ds.n_train, (long long)ds.n_val, (long long)ds.best_epoch);
  printf("validation agreement with the teacher: before %.2f%%, after %.2f%%\n", 100 * ds.before.agreement,
         100 * ds.after.agreement);
  printf("test agreement (first %d test images): before %.2f%%, after (saved file) %.2f%%\n", N_TEST,
         100 * before.metrics.agreement, 100 * after.metrics.agreement);
  printf("test accuracy: before %.2f%%, after %.2f%%; masks kept: %s\n", 100 * before.metrics.top1,
         100 * after.metrics.top1, ds.mask_ok ? "yes" : "no");
  int ok = 1;
  if (!(after.metrics.agreement > before.metrics.agreement)) {
    printf("FAIL: test agreement after %.4f is not above before %.4f\n", after.metrics.agreement,
           before.metrics.agreement);
    ok = 0;
  }
  if (kept_zero != sum.weights_zero || kept_zero == 0) {
    printf("FAIL: masks keep %lld entries at zero, the summary counts %lld zero layer weights\n", kept_zero,
           (long long)sum.weights_zero);
    ok = 0;
  }
  if (!ds.mask_ok) {
    printf("FAIL: pruned entries did not stay zero\n");
    ok = 0;
  }
  if (epochs_seen < 1) {
    printf("FAIL: the progress callback saw %d epochs, expected at least 1\n", epochs_seen);
    ok = 0;
  }
  printf("%s\n", ok ? "OK" : "FAILED");

  rc_eval_result_free(&before);
  rc_eval_result_free(&after);
  rc_distill_summary_free(&ds);
  rc_dataset_free(&test);
  rc_array_free(&train_x);
  rc_array_free(&train_y);
  rc_array_free(&test_x);
  rc_array_free(&test_y);
  rc_model_free(back);
  rc_model_free(student);
  rc_model_free(teacher);
  return ok ? 0 : 1;
}
