/* In-process half of tests/test_corrupt.py: runs many damaged model files
 * through the public API in one process, doing what `recoup inspect` and
 * `recoup eval --batch 2` do with a model (load; counts, weights, grids,
 * ranges, masks, output shapes; one evaluation over the samples). Starting
 * a process per file spent most of the test's time linking its libraries;
 * the command line keeps a subset (test_corrupt.py) for exit codes and the
 * one-line error.
 *
 * Usage: corrupt_load LIST  (each line: MODEL<TAB>SAMPLES.npy)
 * Prints, per file, "file PATH" before touching it (so a crash names the
 * file) and "result STATUS MESSAGE" after (STATUS 0 accepted, 1 refused);
 * exit 0 when every file was handled, 2 on a usage or list error. Judging
 * the results is the script's job. */
#include <recoup/recoup.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

/* The listings `recoup inspect` prints, each freed at once. */
static rc_status inspect_model(const rc_model *m, rc_err *e) {
  rc_model_summary sum;
  RC_TRY(rc_model_summarize(m, &sum, e));
  rc_model_op_count *ops = NULL;
  rc_model_weight *w = NULL;
  rc_model_grid *g = NULL;
  rc_int_range *r = NULL;
  rc_mask_choice *masks = NULL;
  int n_ops = 0, n_w = 0, n_g = 0, n_r = 0, n_masks = 0;
  rc_status st = rc_model_op_counts(m, &ops, &n_ops, e);
  if (st == RC_OK) st = rc_model_weights(m, &w, &n_w, e);
  if (st == RC_OK) st = rc_model_grids(m, &g, &n_g, e);
  if (st == RC_OK) st = rc_model_grid_ranges(m, &r, &n_r, e);
  if (st == RC_OK) st = rc_model_masks(m, RC_MASK_AUTO, &masks, &n_masks, e);
  rc_model_list_free(ops);
  rc_model_list_free(w);
  rc_model_list_free(g);
  rc_model_list_free(r);
  rc_model_list_free(masks);
  if (st != RC_OK) return st;
  /* inspect shows output shapes at batch 1 and MACs, but a model that does
   * not plan is still shown: these errors are not the file's refusal. */
  int64_t macs;
  rc_err ignored = {0};
  (void)rc_model_macs(m, &macs, &ignored);
  int n_in = rc_model_n_inputs(m), n_out = rc_model_n_outputs(m);
  rc_tensor *ins = calloc((size_t)n_in + 1, sizeof *ins), *outs = calloc((size_t)n_out + 1, sizeof *outs);
  if (ins && outs) {
    rc_model_batch_inputs(m, 1, ins);
    (void)rc_model_output_shapes(m, ins, outs, &ignored);
  }
  free(ins);
  free(outs);
  return RC_OK;
}

/* The samples fitted to the first input's declared sample shape, as the
 * command line does, then one evaluation at batch 2. */
static rc_status eval_model(rc_model *m, const char *samples, rc_err *e) {
  rc_array a = {0};
  RC_TRY(rc_array_read(&a, samples, NULL, 0, e));
  rc_model_io in;
  rc_status st = rc_model_input(m, 0, &in, e);
  if (st == RC_OK && in.shape.rank >= 1) {
    rc_tensor sample = {a.t.dtype, in.shape.rank - 1, {0}, NULL};
    int concrete = 1;
    for (int d = 1; d < in.shape.rank; d++) {
      sample.dims[d - 1] = in.shape.dims[d];
      if (in.shape.dims[d] < 0) concrete = 0;
    }
    if (concrete) st = rc_data_fit(&a, &sample, e);
  }
  rc_dataset d;
  memset(&d, 0, sizeof d);
  if (st == RC_OK) st = rc_dataset_init(&d, &a.t, 1, NULL, NULL, 0, e);
  if (st == RC_OK) {
    rc_eval_settings es;
    rc_eval_settings_init(&es);
    es.batch = 2;
    rc_eval_result r;
    memset(&r, 0, sizeof r);
    st = rc_eval_run(&r, m, NULL, &d, &es, e);
    rc_eval_result_free(&r);
    rc_dataset_free(&d);
  }
  rc_array_free(&a);
  return st;
}

static rc_status run_one(const char *model, const char *samples, rc_err *e) {
  rc_model *m = NULL;
  RC_TRY(rc_model_load(&m, model, NULL, e));
  rc_status st = inspect_model(m, e);
  if (st == RC_OK) st = eval_model(m, samples, e);
  rc_model_free(m);
  return st;
}

int main(int argc, char **argv) {
  if (argc != 2) {
    fprintf(stderr, "usage: corrupt_load LIST\n");
    return 2;
  }
  FILE *list = fopen(argv[1], "r");
  if (!list) {
    fprintf(stderr, "corrupt_load: cannot open %s\n", argv[1]);
    return 2;
  }
  char line[8192];
  int handled = 0;
  while (fgets(line, sizeof line, list)) {
    line[strcspn(line, "\n")] = 0;
    char *tab = strchr(line, '\t');
    if (!tab) {
      fprintf(stderr, "corrupt_load: list line without a tab: %s\n", line);
      fclose(list);
      return 2;
    }
    *tab = 0;
    printf("file %s\n", line);
    fflush(stdout);
    rc_err e = {0};
    rc_status st = run_one(line, tab + 1, &e);
    /* One line per result: the message's own newlines would split it. */
    for (char *c = e.msg; *c; c++)
      if (*c == '\n') *c = ' ';
    printf("result %d %s\n", st == RC_OK ? 0 : 1, st == RC_OK ? "" : e.msg);
    fflush(stdout);
    handled++;
  }
  fclose(list);
  fprintf(stderr, "corrupt_load: %d files\n", handled);
  return 0;
}
