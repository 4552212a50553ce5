/* recoup eval MODEL.onnx --data FILE ...: run a model over data and measure it. */
#include <cJSON.h>
#include <getopt.h>
#include <stdlib.h>
#include <string.h>

#include "cli/cli.h"
#include "cli/cli_data.h"
#include "recoup/eval.h"
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
          "  --ref OTHER.onnx       compare with another model on the same samples\n"
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
} eval_args;

static int parse_args(eval_args *a, int argc, char **argv) {
  static const struct option longopts[] = {
      {"data", required_argument, NULL, 'd'},  {"labels", required_argument, NULL, 'l'},
      {"batch", required_argument, NULL, 'b'}, {"scale", required_argument, NULL, 'S'},
      {"mean", required_argument, NULL, 'M'},  {"std", required_argument, NULL, 'D'},
      {"ref", required_argument, NULL, 'r'},   {"out", required_argument, NULL, 'o'},
      {"threads", required_argument, NULL, 't'}, {"json", no_argument, NULL, 'j'},
      {"help", no_argument, NULL, 'h'},        {NULL, 0, NULL, 0}};
  memset(a, 0, sizeof *a);
  cli_data_opts_init(&a->data);
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
      case 'r': a->ref = optarg; break;
      case 'o': a->out = optarg; break;
      case 't':
        if (cli_parse_int(optarg, 0, 1024, &a->threads))
          return cli_usage_error("eval", "--threads expects a count, got '%s'", optarg);
        break;
      case 'j': a->json = 1; break;
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

int rc_cmd_eval(int argc, char **argv) {
  eval_args a;
  int pr = parse_args(&a, argc, argv);
  if (pr) return pr < 0 ? RC_EXIT_OK : pr;
  cli_set_threads((int)a.threads);
  rc_err e = {0};
  cli_samples s;
  rc_dataset d;
  memset(&s, 0, sizeof s);
  memset(&d, 0, sizeof d);
  rc_model *model = NULL, *ref = NULL;
  rc_eval_result r;
  memset(&r, 0, sizeof r);
  int rc = RC_EXIT_FAIL;
  if (a.out && check_output_path(&a, &e) != RC_OK) goto out;
  if (rc_model_load(&model, a.model, NULL, &e) != RC_OK) goto out;
  if (cli_samples_load(&s, &a.data, model, &e) != RC_OK) goto out;
  if (a.data.labels) {
    int64_t k = 0;
    if (cli_output_classes(model, &k, &e) != RC_OK) goto out;
    if (cli_samples_load_labels(&s, a.data.labels, k, &e) != RC_OK) goto out;
  }
  if (a.ref && rc_model_load(&ref, a.ref, NULL, &e) != RC_OK) goto out;
  if (cli_samples_dataset(&d, &s, NULL, 0, &e) != RC_OK) goto out;
  rc_eval_settings es;
  rc_eval_settings_init(&es);
  es.batch = a.batch;
  es.keep_outputs = a.out != NULL;
  if (rc_eval_run(&r, model, ref, &d, &es, &e) != RC_OK) goto out;
  if (a.out && write_outputs(&r, a.out, &e) != RC_OK) goto out;
  int want_metrics = a.data.labels || a.ref;
  print_result(&a, &s, want_metrics ? &r.metrics : NULL, want_metrics ? r.classes : 0);
  rc = RC_EXIT_OK;
out:
  if (rc != RC_EXIT_OK) cli_fail(&e);
  rc_eval_result_free(&r);
  rc_dataset_free(&d);
  cli_samples_free(&s);
  rc_model_free(ref);
  rc_model_free(model);
  return rc;
}
