/* recoup eval MODEL.onnx --data FILE ...: run a model over data and measure it. */
#include <cJSON.h>
#include <getopt.h>
#include <stdlib.h>
#include <string.h>

#include "cli/cli.h"
#include "cli/cli_data.h"
#include "cli/cli_outputs.h"
#include "recoup/eval.h"
#include "recoup/model.h"
#include "recoup/util.h"

static void usage(FILE *f) {
  fprintf(f,
          "Usage: recoup eval MODEL.onnx --data FILE [--data NAME=FILE ...] [OPTIONS]\n"
          "\n"
          "Run a model over samples in batches. With labels, report top-1 (and top-5\n"
          "where there are at least 5 classes) accuracy; with --ref, top-1 agreement\n"
          "with the other model and the mean KL(other || model) of their softmax outputs.\n"
          "\n"
          "Data files: NumPy .npy/.npz, IDX (plain or .gz, as the MNIST family ships),\n"
          "ONNX TensorProto .pb. A model with several inputs takes --data NAME=FILE each.\n"
          "\n"
          "Options:\n"
          "  --data FILE|NAME=FILE  samples, first axis = sample (repeatable)\n"
          "  --labels FILE          integer class labels, one per sample\n"
          "  --batch N              samples per batch (default 64)\n"
          "  --scale S              multiply raw values by S (default 1; 0.00392 maps 0..255 to 0..1)\n"
          "  --mean M[,M...]        subtract after scaling, one value or one per channel\n"
          "  --std D[,D...]         then divide, one value or one per channel\n"
          CLI_IMAGE_HELP
          "  --ref OTHER.onnx       compare with another model on the same samples\n"
          "  --output-loss OUT=TERM[:key=value]  measure output OUT as a class map (kd,\n"
          "                         kd-sigmoid: per-position agreement, mean IoU) or as values\n"
          "                         (mse, smooth-l1, edge-kd: mean absolute difference);\n"
          "                         default for models whose first output is not (N, classes):\n"
          "                         every float output of rank >= 3 is a class map on axis 1;\n"
          "                         --labels then holds per-position classes of the first one\n"
          "  --ignore-label V       dense label value left out of the figures (default 255)\n"
          "  --out FILE             X.npy: first output; X.npz: every output by name\n"
          "  --threads N            compute threads; 0 (the default) uses every online core\n"
          "  --json                 print results as one JSON object on stdout\n"
          "  -h, --help             show this help\n"
          "\n"
          "Accuracy holds only for the data measured: validate on your own held-out data.\n");
}

typedef struct eval_args {
  const char *model, *ref, *out;
  cli_data_opts data;
  long batch, threads;
  int json;
  const char *terms[RC_EVAL_OUTPUTS_MAX]; /* --output-loss, checked */
  int n_terms;
  long ignore;
} eval_args;

static int add_term(eval_args *a, const char *text) {
  if (a->n_terms == RC_EVAL_OUTPUTS_MAX)
    return cli_usage_error("eval", "at most %d --output-loss terms", RC_EVAL_OUTPUTS_MAX);
  rc_err e = {0};
  if (rc_eval_output_term_check(text, &e) != RC_OK) return cli_option_usage_error("eval", "--output-loss", &e);
  a->terms[a->n_terms++] = text;
  return 0;
}

static int parse_args(eval_args *a, int argc, char **argv) {
  static const struct option longopts[] = {
      {"data", required_argument, NULL, 'd'},  {"labels", required_argument, NULL, 'l'},
      {"batch", required_argument, NULL, 'b'}, {"scale", required_argument, NULL, 'S'},
      {"mean", required_argument, NULL, 'M'},  {"std", required_argument, NULL, 'D'},
      {"ref", required_argument, NULL, 'r'},   {"out", required_argument, NULL, 'o'},
      {"threads", required_argument, NULL, 't'}, {"json", no_argument, NULL, 'j'},
      {"output-loss", required_argument, NULL, 'L'}, {"ignore-label", required_argument, NULL, 'I'},
      {"resize", required_argument, NULL, 'R'}, {"skip-bad", no_argument, NULL, 'K'},
      {"image-memory", required_argument, NULL, 'G'},
      {"help", no_argument, NULL, 'h'},        {NULL, 0, NULL, 0}};
  memset(a, 0, sizeof *a);
  cli_data_opts_init(&a->data);
  a->ignore = RC_EVAL_DEFAULT_IGNORE_LABEL;
  a->batch = 64;
  int c;
  optind = 1;
  while ((c = getopt_long(argc, argv, "h", longopts, NULL)) != -1) {
    switch (c) {
      case 'd':
        if (a->data.n_data == CLI_MAX_DATA) return cli_usage_error("eval", "too many --data");
        a->data.data[a->data.n_data++] = optarg;
        break;
      case 'l': a->data.labels = optarg; break;
      case 'b':
        if (cli_parse_int(optarg, 1, 1 << 20, &a->batch))
          return cli_usage_error("eval", "--batch expects a positive integer, got '%s'", optarg);
        break;
      case 'S': if (cli_data_option(&a->data, "eval", "scale", optarg)) return RC_EXIT_USAGE; break;
      case 'M': if (cli_data_option(&a->data, "eval", "mean", optarg)) return RC_EXIT_USAGE; break;
      case 'D': if (cli_data_option(&a->data, "eval", "std", optarg)) return RC_EXIT_USAGE; break;
      case 'R': if (cli_data_option(&a->data, "eval", "resize", optarg)) return RC_EXIT_USAGE; break;
      case 'K': cli_data_option(&a->data, "eval", "skip-bad", NULL); break;
      case 'G': if (cli_data_option(&a->data, "eval", "image-memory", optarg)) return RC_EXIT_USAGE; break;
      case 'r': a->ref = optarg; break;
      case 'o': a->out = optarg; break;
      case 't':
        if (cli_parse_int(optarg, 0, 1024, &a->threads))
          return cli_usage_error("eval", "--threads expects a count, got '%s'", optarg);
        break;
      case 'j': a->json = 1; break;
      case 'L':
        if (add_term(a, optarg)) return RC_EXIT_USAGE;
        break;
      case 'I':
        if (cli_parse_int(optarg, -2147483647L, 2147483647L, &a->ignore))
          return cli_usage_error("eval", "--ignore-label expects an integer, got '%s'", optarg);
        break;
      case 'h': usage(stdout); return -1;
      default: return cli_bad_option("eval", argv, longopts);
    }
  }
  if (optind != argc - 1) return cli_usage_error("eval", "expects exactly one MODEL.onnx");
  a->model = argv[optind];
  if (!a->data.n_data) return cli_usage_error("eval", "--data is required");
  if (a->out) {
    size_t n = strlen(a->out);
    if (n < 5 || (strcmp(a->out + n - 4, ".npy") && strcmp(a->out + n - 4, ".npz")))
      return cli_usage_error("eval", "--out must end in .npy or .npz");
  }
  return 0;
}

static void print_outputs_result(const eval_args *a, const cli_samples *s, const rc_metrics *m) {
  if (a->json) {
    cJSON *root = cJSON_CreateObject();
    cJSON_AddStringToObject(root, "model", a->model);
    cJSON_AddNumberToObject(root, "samples", (double)s->n);
    if (a->ref) cJSON_AddStringToObject(root, "ref", a->ref);
    if (m->has_ref) cJSON_AddNumberToObject(root, "position_agreement", m->agreement);
    if (m->has_labels) cJSON_AddNumberToObject(root, "position_accuracy", m->top1);
    cli_outputs_metrics_json(root, m);
    if (!m->has_ref) {
      cJSON_DeleteItemFromObject(root, "output_loss");
      cJSON_DeleteItemFromObject(root, "miou_dense");
      cJSON_DeleteItemFromObject(root, "value_mad");
    }
    char *text = cJSON_Print(root);
    if (text) puts(text);
    free(text);
    cJSON_Delete(root);
    return;
  }
  printf("model            %s\nsamples          %lld\n", a->model, (long long)s->n);
  if (a->ref) printf("reference        %s\n", a->ref);
  cli_outputs_table_header();
  cli_outputs_table_row(a->ref ? "model vs reference" : "model", m);
}

/* X.npy: the first output; X.npz: every output by name. */
static rc_status write_outputs(const rc_eval_result *r, const char *path, rc_err *e) {
  if (!strcmp(path + strlen(path) - 4, ".npy")) return rc_npy_write(path, &r->outputs[0], e);
  return rc_npz_write(path, r->names, r->outputs, r->n_outputs, e);
}

static void print_result(const eval_args *a, const cli_samples *s, const rc_metrics *m, int64_t k) {
  if (a->json) {
    cJSON *root = cJSON_CreateObject();
    cJSON_AddStringToObject(root, "model", a->model);
    cJSON_AddNumberToObject(root, "samples", (double)s->n);
    if (m && m->has_labels) {
      cJSON_AddNumberToObject(root, "top1_accuracy", m->top1);
      if (m->top5 >= 0) cJSON_AddNumberToObject(root, "top5_accuracy", m->top5);
    }
    if (m && m->has_ref) {
      cJSON_AddStringToObject(root, "ref", a->ref);
      cJSON_AddNumberToObject(root, "top1_agreement", m->agreement);
      cJSON_AddNumberToObject(root, "mean_kl_ref_to_model", m->kl);
    }
    if (k) cJSON_AddNumberToObject(root, "classes", (double)k);
    if (a->out) cJSON_AddStringToObject(root, "out", a->out);
    cli_images_json(root, s);
    char *text = cli_json_print(root);
    if (text) puts(text);
    free(text);
    cJSON_Delete(root);
    return;
  }
  char nb[1024];
  printf("model            %s\n", cli_esc(a->model, nb, sizeof nb));
  printf("samples          %lld\n", (long long)s->n);
  if (m && m->has_labels) {
    printf("top-1 accuracy   %.2f%% (%lld of %lld)\n", 100 * m->top1, (long long)(m->top1 * (double)m->n + 0.5),
           (long long)m->n);
    if (m->top5 >= 0) printf("top-5 accuracy   %.2f%%\n", 100 * m->top5);
  }
  if (m && m->has_ref) {
    printf("reference        %s\n", cli_esc(a->ref, nb, sizeof nb));
    printf("top-1 agreement  %.2f%%\n", 100 * m->agreement);
    char kl[32];
    printf("mean KL(ref||model) %s\n", rc_fmt_sig(kl, sizeof kl, m->kl, RC_FMT_SIG, 0));
  }
  if (a->out) printf("outputs written  %s\n", cli_esc(a->out, nb, sizeof nb));
}

/* --out may be none of the files read (compared as files, not names). */
static rc_status check_output_path(const eval_args *a, rc_err *e) {
  const char *inputs[3 + CLI_MAX_DATA], *labels[3 + CLI_MAX_DATA];
  int n = 0;
  inputs[n] = a->model, labels[n++] = "the model";
  inputs[n] = a->ref, labels[n++] = "--ref";
  inputs[n] = a->data.labels, labels[n++] = "--labels";
  for (int i = 0; i < a->data.n_data; i++) inputs[n] = cli_data_file(a->data.data[i]), labels[n++] = "--data";
  return cli_check_output("--out", a->out, inputs, labels, n, e);
}

/* 1 when the first output is float (N, K) logits; *k gets K. */
static rc_status first_output_logits(const rc_model *m, const cli_samples *s, int *logits, int64_t *k, rc_err *e) {
  rc_tensor t;
  RC_TRY(cli_first_output_shape(m, s, &t, e));
  *logits = t.dtype == RC_DTYPE_FLOAT && t.rank == 2;
  *k = *logits ? t.dims[1] : 0;
  return RC_OK;
}

/* Figures per output (class maps, values) against the reference and dense labels. */
static rc_status eval_per_output(rc_eval_result *r, const eval_args *a, rc_model *model, rc_model *ref,
                                 const rc_dataset *d, rc_err *e) {
  rc_array labels = {0};
  if (a->data.labels) RC_TRY(rc_array_read(&labels, a->data.labels, NULL, 0, e));
  rc_eval_settings es;
  rc_eval_settings_init(&es);
  es.batch = a->batch;
  es.keep_outputs = a->out != NULL;
  es.per_output = 1;
  es.output_terms = a->terms;
  es.n_output_terms = a->n_terms;
  es.dense_labels = a->data.labels ? &labels : NULL;
  es.dense_labels_name = a->data.labels;
  es.ignore_label = (int32_t)a->ignore;
  rc_status st = rc_eval_run(r, model, ref, d, &es, e);
  if (st != RC_OK) cli_outputs_part_context(e, r->failed);
  rc_array_free(&labels);
  return st;
}

int rc_cmd_eval(int argc, char **argv) {
  eval_args a;
  int pr = parse_args(&a, argc, argv);
  if (pr) return pr < 0 ? RC_EXIT_OK : pr;
  cli_set_threads((int)a.threads);
  rc_err e = {0};
  cli_samples s;
  rc_dataset d;
  rc_eval_result r;
  memset(&s, 0, sizeof s);
  memset(&d, 0, sizeof d);
  memset(&r, 0, sizeof r);
  rc_model *model = NULL, *ref = NULL;
  int rc = RC_EXIT_FAIL, logits = 0;
  int64_t k = 0;
  if (a.out && check_output_path(&a, &e) != RC_OK) goto out;
  if (rc_model_load(&model, a.model, NULL, &e) != RC_OK) goto out;
  if (cli_prep_apply(&a.data, model, &e) != RC_OK) goto out;
  if (cli_samples_load(&s, &a.data, model, &e) != RC_OK) goto out;
  int want_metrics = a.data.labels || a.ref;
  if (want_metrics && first_output_logits(model, &s, &logits, &k, &e) != RC_OK) goto out;
  if (want_metrics && (a.n_terms || !logits)) {
    if (a.ref && rc_model_load(&ref, a.ref, NULL, &e) != RC_OK) goto out;
    if (cli_samples_dataset(&d, &s, NULL, 0, &e) != RC_OK) goto out;
    if (eval_per_output(&r, &a, model, ref, &d, &e) != RC_OK) goto out;
    cli_images_finish(&s); /* one pass read every image: the unreadable ones are known */
    if (a.out && write_outputs(&r, a.out, &e) != RC_OK) goto out;
    print_outputs_result(&a, &s, &r.metrics);
    rc = RC_EXIT_OK;
    goto out;
  }
  if (a.data.labels && cli_samples_load_labels(&s, a.data.labels, k, &e) != RC_OK) goto out;
  if (cli_samples_dataset(&d, &s, NULL, 0, &e) != RC_OK) goto out;
  if (a.ref && rc_model_load(&ref, a.ref, NULL, &e) != RC_OK) goto out;
  rc_eval_settings es;
  rc_eval_settings_init(&es);
  es.batch = a.batch;
  es.keep_outputs = a.out != NULL;
  if (rc_eval_run(&r, model, ref, &d, &es, &e) != RC_OK) goto out;
  cli_images_finish(&s); /* one pass read every image: the unreadable ones are known */
  if (a.out && write_outputs(&r, a.out, &e) != RC_OK) goto out;
  print_result(&a, &s, want_metrics ? &r.metrics : NULL, want_metrics ? r.classes : 0);
  rc = RC_EXIT_OK;
out:
  if (rc != RC_EXIT_OK) cli_fail(&e);
  rc_eval_result_free(&r);
  rc_dataset_free(&d);
  cli_samples_free(&s);
  rc_model_free(model);
  rc_model_free(ref);
  return rc;
}
