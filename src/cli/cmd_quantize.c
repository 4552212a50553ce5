/* recoup quantize DENSE.onnx --data CALIB --out Q.onnx: post-training
 * quantization into a QDQ model for users who hold only the dense model. */
#define _DEFAULT_SOURCE /* realpath */
#include <cJSON.h>
#include <getopt.h>
#include <libgen.h>
#include <limits.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "cli/cli.h"
#include "cli/cli_data.h"
#include "recoup/eval.h"
#include "recoup/model.h"
#include "recoup/quantize.h"
#include "recoup/util.h"

static void usage(FILE *f) {
  fprintf(f,
          "Usage: recoup quantize DENSE.onnx --data CALIB --out QUANTIZED.onnx [OPTIONS]\n"
          "\n"
          "Quantize a dense float model after training: BatchNormalization is folded\n"
          "into the Conv before it, weights go on symmetric per-output-channel integer\n"
          "grids, and activation ranges are measured by running the float model on the\n"
          "calibration samples. The result is a QDQ model (integer initializers and\n"
          "QuantizeLinear/DequantizeLinear pairs) that ONNX runtimes run as is and\n"
          "integer runtimes fuse into integer kernels; `recoup distill` can fine-tune it.\n"
          "\n"
          "Options:\n"
          "  --data FILE|NAME=FILE    calibration samples (.npy, .npz, IDX, .gz, .pb); repeatable\n"
          "  --out FILE               the quantized model (never the input)\n"
          "  --weight-bits 8|4        weight grid: int8 [-127,127] or int4 [-7,7] (default 8)\n"
          "  --activation-bits 8|none uint8 activation grids, or weights only (default 8)\n"
          "  --calibration minmax|percentile  activation range (default percentile)\n"
          "  --percentile P           central share of values kept (default 99.99)\n"
          "  --batch N                calibration batch size (default 64)\n"
          "  --output-margin F        grids of the graph outputs span 1+F times their\n"
          "                           calibrated range, so outputs a little beyond the\n"
          "                           calibration samples are not clipped (default 0.1)\n"
          "  --scale S, --mean M[,..], --std D[,..]   x' = (x*S - M) / D, as for eval\n"
          CLI_IMAGE_HELP
          "  --limit N                calibrate on N samples: the first N after a seeded shuffle\n"
          "  --seed S                 the shuffle for --limit (default 1)\n"
          "  --threads N              compute threads; 0 (the default) uses every online core\n"
          "  --json                   print the summary as one JSON object on stdout\n"
          "  -h, --help               show this help\n"
          "\n"
          "4-bit weights are stored as int4 when the model's opset is 21 or later;\n"
          "older opsets get int8 tensors holding values in [-7, 7].\n"
          "What quantize adds is named after the tensor T it belongs to: T.grid (integers),\n"
          "T.grid_step and T.grid_zero (scale, zero point), T.on_grid (the float values\n"
          "consumers read), nodes T.to_grid and T.from_grid.\n"
          "The agreement printed is measured on the calibration samples only: validate\n"
          "the quantized model on your own held-out data before deploying it.\n");
}

typedef struct quantize_args {
  const char *model, *out;
  cli_data_opts data;
  long limit, seed; /* --limit N samples after a shuffle seeded with --seed */
  rc_quant_config cfg;
  long threads;
  int json;
} quantize_args;

enum { OPT_DATA = 256, OPT_OUT, OPT_WBITS, OPT_ABITS, OPT_CALIB, OPT_PCT, OPT_BATCH, OPT_SCALE, OPT_MEAN, OPT_STD,
       OPT_THREADS, OPT_JSON, OPT_MARGIN, OPT_RESIZE, OPT_SKIP_BAD, OPT_LIMIT, OPT_SEED,
       OPT_IMAGE_MEMORY };

static int apply_option(quantize_args *a, int c, const char *v);
static int apply_option_ctx(void *a, int c, const char *v) { return apply_option(a, c, v); }

static int apply_option(quantize_args *a, int c, const char *v) {
  long l;
  double d;
  switch (c) {
    case OPT_DATA:
      if (a->data.n_data == CLI_MAX_DATA) return cli_usage_error("quantize", "too many --data");
      a->data.data[a->data.n_data++] = v;
      return 0;
    case OPT_OUT: a->out = v; return 0;
    case OPT_WBITS:
      if (strcmp(v, "8") && strcmp(v, "4")) return cli_usage_error("quantize", "--weight-bits expects 8 or 4, got '%s'", v);
      a->cfg.weight_bits = atoi(v);
      return 0;
    case OPT_ABITS:
      if (!strcmp(v, "8")) a->cfg.activation_bits = 8;
      else if (!strcmp(v, "none")) a->cfg.activation_bits = 0;
      else return cli_usage_error("quantize", "--activation-bits expects 8 or none, got '%s'", v);
      return 0;
    case OPT_CALIB:
      if (!strcmp(v, "minmax")) a->cfg.calib = RC_CALIB_MINMAX;
      else if (!strcmp(v, "percentile")) a->cfg.calib = RC_CALIB_PERCENTILE;
      else return cli_usage_error("quantize", "--calibration expects minmax or percentile, got '%s'", v);
      return 0;
    case OPT_PCT:
      if (cli_parse_float(v, &d) || !(d > 50 && d <= 100))
        return cli_usage_error("quantize", "--percentile expects a number in (50, 100], got '%s'", v);
      a->cfg.percentile = d;
      return 0;
    case OPT_BATCH:
      if (cli_parse_int(v, 1, 1 << 16, &l)) return cli_usage_error("quantize", "--batch expects a positive integer, got '%s'", v);
      a->cfg.batch = l;
      return 0;
    case OPT_MARGIN:
      if (cli_parse_float(v, &d) || !(d >= 0 && d <= RC_QUANT_MARGIN_MAX))
        return cli_usage_error("quantize", "--output-margin expects a number in [0, %d], got '%s'", RC_QUANT_MARGIN_MAX,
                               v);
      a->cfg.output_margin = d;
      return 0;
    case OPT_SCALE: return cli_data_option(&a->data, "quantize", "scale", v);
    case OPT_MEAN: return cli_data_option(&a->data, "quantize", "mean", v);
    case OPT_STD: return cli_data_option(&a->data, "quantize", "std", v);
    case OPT_RESIZE: return cli_data_option(&a->data, "quantize", "resize", v);
    case OPT_LIMIT:
      if (cli_parse_int(v, 1, LONG_MAX, &a->limit))
        return cli_usage_error("quantize", "--limit expects a positive sample count, got '%s'", v);
      return 0;
    case OPT_SEED:
      if (cli_parse_int(v, 0, LONG_MAX, &a->seed)) return cli_usage_error("quantize", "--seed expects a count, got '%s'", v);
      return 0;
    case OPT_SKIP_BAD: return cli_data_option(&a->data, "quantize", "skip-bad", v);
    case OPT_IMAGE_MEMORY: return cli_data_option(&a->data, "quantize", "image-memory", v);
    case OPT_THREADS:
      if (cli_parse_int(v, 0, 1024, &l)) return cli_usage_error("quantize", "--threads expects a count, got '%s'", v);
      a->threads = l;
      return 0;
    case OPT_JSON: a->json = 1; return 0;
  }
  return cli_usage_error("quantize", "unknown option");
}

static int parse_args(quantize_args *a, int argc, char **argv) {
  static const struct option longopts[] = {
      {"data", required_argument, NULL, OPT_DATA},         {"out", required_argument, NULL, OPT_OUT},
      {"weight-bits", required_argument, NULL, OPT_WBITS}, {"activation-bits", required_argument, NULL, OPT_ABITS},
      {"calibration", required_argument, NULL, OPT_CALIB}, {"percentile", required_argument, NULL, OPT_PCT},
      {"batch", required_argument, NULL, OPT_BATCH},       {"scale", required_argument, NULL, OPT_SCALE},
      {"mean", required_argument, NULL, OPT_MEAN},         {"std", required_argument, NULL, OPT_STD},
      {"resize", required_argument, NULL, OPT_RESIZE},     {"skip-bad", no_argument, NULL, OPT_SKIP_BAD},
      {"limit", required_argument, NULL, OPT_LIMIT},       {"seed", required_argument, NULL, OPT_SEED},
      {"threads", required_argument, NULL, OPT_THREADS},   {"json", no_argument, NULL, OPT_JSON},
      {"output-margin", required_argument, NULL, OPT_MARGIN}, {"image-memory", required_argument, NULL, OPT_IMAGE_MEMORY},
      {"help", no_argument, NULL, 'h'},                    {NULL, 0, NULL, 0}};
  memset(a, 0, sizeof *a);
  cli_data_opts_init(&a->data);
  a->seed = 1;
  rc_quant_config_init(&a->cfg);
  int pr = cli_parse_options(argc, argv, longopts, "quantize", apply_option_ctx, a, usage);
  if (pr) return pr;
  if (optind != argc - 1) return cli_usage_error("quantize", "expects exactly one DENSE.onnx");
  a->model = argv[optind];
  if (!a->data.n_data || !a->out) return cli_usage_error("quantize", "--data and --out are required");
  if (a->data.labels) return cli_usage_error("quantize", "calibration needs no labels");
  return 0;
}

static rc_status check_output_path(const quantize_args *a, rc_err *e) {
  const char *inputs[1 + CLI_MAX_DATA], *labels[1 + CLI_MAX_DATA];
  int n = 0;
  inputs[n] = a->model, labels[n++] = "the model";
  for (int i = 0; i < a->data.n_data; i++) inputs[n] = cli_data_file(a->data.data[i]), labels[n++] = "--data";
  return cli_check_output("--out", a->out, inputs, labels, n, e);
}

/* A model's outputs over every sample of d; the first must be float32. */
static rc_status run_outputs(rc_eval_result *r, rc_model *m, const rc_dataset *d, int64_t batch, rc_err *e) {
  rc_eval_settings es;
  rc_eval_settings_init(&es);
  es.batch = batch;
  es.keep_outputs = 1;
  RC_TRY(rc_eval_run(r, m, NULL, d, &es, e));
  if (r->outputs[0].dtype != RC_DTYPE_FLOAT)
    return rc_err_set(e, RC_ERR_SHAPE, "%s: first output '%s' is not float32 with the batch first",
                      rc_model_path(m), r->names[0]);
  return RC_OK;
}

typedef struct comparison {
  int have_metrics;
  rc_metrics m;
  double max_abs_diff;
} comparison;

/* Reload the written file (so what is reported is the file), run it and the
 * float model on the calibration samples and compare their first outputs. */
static rc_status verify_written(comparison *c, const char *out, rc_model *dense, const rc_dataset *d,
                                int64_t batch, rc_err *e) {
  memset(c, 0, sizeof *c);
  rc_model *q = NULL;
  rc_eval_result fr, qr;
  memset(&fr, 0, sizeof fr);
  memset(&qr, 0, sizeof qr);
  rc_status st = rc_model_load(&q, out, NULL, e);
  if (st != RC_OK) rc_err_prefix(e, "the written model does not load back");
  if (st == RC_OK) st = run_outputs(&fr, dense, d, batch, e);
  if (st == RC_OK) st = run_outputs(&qr, q, d, batch, e);
  int64_t f_per = st == RC_OK ? rc_tensor_numel(&fr.outputs[0]) / d->n : 0;
  int64_t q_per = st == RC_OK ? rc_tensor_numel(&qr.outputs[0]) / d->n : 0;
  if (st == RC_OK && q_per != f_per)
    st = rc_err_set(e, RC_ERR_SHAPE, "%s: first output has %lld values per sample, the float model %lld", out,
                    (long long)q_per, (long long)f_per);
  const float *fo = st == RC_OK ? fr.outputs[0].data : NULL, *qo = st == RC_OK ? qr.outputs[0].data : NULL;
  for (int64_t i = 0; st == RC_OK && i < f_per * d->n; i++) {
    double diff = fabs((double)qo[i] - fo[i]);
    if (!(diff == diff))
      st = rc_err_set(e, RC_ERR_NUMERIC, "%s: output value %lld is not finite", out, (long long)i);
    else if (diff > c->max_abs_diff)
      c->max_abs_diff = diff;
  }
  int64_t k = st == RC_OK && fr.outputs[0].rank == 2 ? fr.outputs[0].dims[1] : 0;
  if (st == RC_OK && k > 1) {
    st = rc_eval_metrics(&c->m, qo, NULL, fo, d->n, k, e);
    c->have_metrics = st == RC_OK;
  }
  rc_eval_result_free(&fr);
  rc_eval_result_free(&qr);
  rc_model_free(q);
  return st;
}

static long long file_size(const char *path) {
  struct stat st;
  return stat(path, &st) == 0 ? (long long)st.st_size : -1;
}

static const char *bias_text(int b) { return b == 2 ? "int32" : b == 1 ? "float" : "-"; }

static void print_json(const quantize_args *a, const rc_quant_report *r, const comparison *c, long long before,
                       long long after) {
  cJSON *root = cJSON_CreateObject();
  cJSON_AddStringToObject(root, "model", a->model);
  cJSON_AddStringToObject(root, "out", a->out);
  cJSON_AddNumberToObject(root, "weight_bits", a->cfg.weight_bits);
  cJSON_AddStringToObject(root, "weight_dtype", rc_dtype_name(r->weight_dtype));
  cJSON_AddBoolToObject(root, "int4_stored_as_int8", r->int4_as_int8);
  if (a->cfg.activation_bits) cJSON_AddNumberToObject(root, "activation_bits", a->cfg.activation_bits);
  else cJSON_AddNullToObject(root, "activation_bits");
  cJSON_AddStringToObject(root, "calibration", a->cfg.calib == RC_CALIB_MINMAX ? "minmax" : "percentile");
  if (a->cfg.calib == RC_CALIB_PERCENTILE) cJSON_AddNumberToObject(root, "percentile", a->cfg.percentile);
  cJSON_AddNumberToObject(root, "calibration_samples", (double)r->calib_samples);
  cJSON_AddNumberToObject(root, "output_margin", a->cfg.output_margin);
  cJSON_AddNumberToObject(root, "bn_folded", r->n_bn_folded);
  cJSON_AddNumberToObject(root, "biases_float", r->n_bias_float);
  cJSON *layers = cJSON_AddArrayToObject(root, "layers");
  for (int i = 0; i < r->n_layers; i++) {
    const rc_quant_layer *L = &r->layers[i];
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "name", L->name);
    cJSON_AddStringToObject(o, "op", L->op_type);
    cJSON_AddNumberToObject(o, "channels", (double)L->channels);
    cJSON_AddNumberToObject(o, "axis", L->axis);
    cJSON_AddNumberToObject(o, "scale_min", L->scale_min);
    cJSON_AddNumberToObject(o, "scale_max", L->scale_max);
    cJSON_AddBoolToObject(o, "bn_folded", L->bn_folded);
    if (L->bias) cJSON_AddStringToObject(o, "bias", bias_text(L->bias));
    else cJSON_AddNullToObject(o, "bias");
    cJSON_AddItemToArray(layers, o);
  }
  cJSON *grids = cJSON_AddArrayToObject(root, "activation_grids");
  for (int i = 0; i < r->n_grids; i++) {
    const rc_quant_grid *g = &r->grids[i];
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "tensor", g->tensor);
    cJSON_AddNumberToObject(o, "min", g->lo);
    cJSON_AddNumberToObject(o, "max", g->hi);
    cJSON_AddNumberToObject(o, "scale", g->scale);
    cJSON_AddNumberToObject(o, "zero_point", g->zero_point);
    cJSON_AddNumberToObject(o, "margin", g->margin);
    cJSON_AddItemToArray(grids, o);
  }
  cJSON_AddNumberToObject(root, "bytes_before", (double)before);
  cJSON_AddNumberToObject(root, "bytes_after", (double)after);
  cJSON_AddNumberToObject(root, "max_abs_output_diff", c->max_abs_diff);
  if (c->have_metrics) {
    cJSON_AddNumberToObject(root, "top1_agreement", c->m.agreement);
    cJSON_AddNumberToObject(root, "mean_kl_float_to_quantized", c->m.kl);
  }
  char *text = cli_json_print(root);
  if (text) puts(text);
  free(text);
  cJSON_Delete(root);
}

/* The output margin, stated where it changed a grid. */
static void print_margin(const quantize_args *a, const rc_quant_report *r) {
  int n = 0;
  for (int i = 0; i < r->n_grids; i++) n += r->grids[i].margin > 0;
  if (n)
    printf("  output grids: %d, range stretched %.3g%% beyond the calibrated one (--output-margin %g)\n", n,
           100 * a->cfg.output_margin, a->cfg.output_margin);
  else if (a->cfg.output_margin > 0)
    printf("  output grids: none of their own; --output-margin %g changed no grid\n", a->cfg.output_margin);
}

static void print_table(const quantize_args *a, const rc_quant_report *r, const comparison *c, long long before,
                        long long after) {
  char b1[32], b2[32];
  char mb[1024], ob[1024];
  printf("quantized %s -> %s\n", cli_esc(a->model, mb, sizeof mb), cli_esc(a->out, ob, sizeof ob));
  printf("weights      %d-bit symmetric per channel, stored as %s%s\n", a->cfg.weight_bits,
         rc_dtype_name(r->weight_dtype),
         r->int4_as_int8 ? " (opset below 21 has no int4: values kept in [-7, 7] on int8 tensors)" : "");
  if (a->cfg.activation_bits)
    printf("activations  uint8 per tensor, %d grids, %s calibration on %lld samples\n", r->n_grids,
           a->cfg.calib == RC_CALIB_MINMAX ? "min/max" : "percentile", (long long)r->calib_samples);
  else
    printf("activations  float (weights only)\n");
  printf("BatchNormalization folded into Conv: %d\n\n", r->n_bn_folded);
  printf("  %-28s %-14s %8s %12s %12s %6s\n", "layer", "op", "channels", "scale min", "scale max", "bias");
  for (int i = 0; i < r->n_layers; i++) {
    const rc_quant_layer *L = &r->layers[i];
    char nb[512];
    printf("  %-28.28s %-14s %8lld %12.4g %12.4g %6s%s\n", cli_esc(L->name, nb, sizeof nb), L->op_type, (long long)L->channels, L->scale_min,
           L->scale_max, bias_text(L->bias), L->bn_folded ? "  (BN folded)" : "");
  }
  if (r->n_grids) {
    printf("\n  %-40s %11s %11s %11s %5s\n", "activation tensor", "min", "max", "scale", "zero");
    for (int i = 0; i < r->n_grids; i++) {
      const rc_quant_grid *g = &r->grids[i];
      printf("  %-40.40s %11.4g %11.4g %11.4g %5d%s\n", g->tensor, g->lo, g->hi, g->scale, g->zero_point,
             g->margin > 0 ? "  (output)" : "");
    }
    print_margin(a, r);
  }
  printf("\nfile size    %s -> %s bytes\n", cli_group_digits(before, b1, sizeof b1), cli_group_digits(after, b2, sizeof b2));
  if (c->have_metrics) {
    char kl[32];
    printf("vs float     top-1 agreement %.2f%%, mean KL(float||quantized) %s (calibration samples)\n",
           100 * c->m.agreement, rc_fmt_sig(kl, sizeof kl, c->m.kl, RC_FMT_SIG, 0));
  }
  printf("             largest output difference %.4g\n", c->max_abs_diff);
  printf("Validate on your own held-out data before deploying: these figures hold only for\nthe samples measured.\n");
}

int rc_cmd_quantize(int argc, char **argv) {
  quantize_args a;
  int pr = parse_args(&a, argc, argv);
  if (pr) return pr < 0 ? RC_EXIT_OK : pr;
  cli_set_threads((int)a.threads);
  rc_err e = {0};
  cli_samples s;
  rc_dataset d;
  memset(&s, 0, sizeof s);
  memset(&d, 0, sizeof d);
  rc_quant_report rep;
  memset(&rep, 0, sizeof rep);
  rc_model *m = NULL;
  int rc = RC_EXIT_FAIL, written = 0;
  comparison cmp;
  if (check_output_path(&a, &e) != RC_OK) goto out;
  if (rc_model_load(&m, a.model, NULL, &e) != RC_OK) goto out;
  if (cli_prep_apply(&a.data, m, &e) != RC_OK) goto out;
  if (cli_samples_load(&s, &a.data, m, &e) != RC_OK) goto out;
  if (cli_samples_dataset_limit(&d, &s, a.limit, (uint64_t)a.seed, &e) != RC_OK) goto out;
  if (rc_quantize_model(m, &d, &a.cfg, &rep, &e) != RC_OK) goto out;
  if (cli_prep_record(m, &a.data, &e) != RC_OK) goto out;
  if (rc_model_save(m, a.out, NULL, 0, &e) != RC_OK) goto out;
  written = 1;
  int64_t batch = a.cfg.batch < d.n ? a.cfg.batch : d.n;
  if (verify_written(&cmp, a.out, m, &d, batch, &e) != RC_OK) goto out;
  cli_images_finish(&s);
  if (a.json)
    print_json(&a, &rep, &cmp, (long long)rc_model_file_bytes(m), file_size(a.out));
  else
    print_table(&a, &rep, &cmp, (long long)rc_model_file_bytes(m), file_size(a.out));
  rc = RC_EXIT_OK;
out:
  if (rc != RC_EXIT_OK) {
    if (written && unlink(a.out) == 0) rc_err_prefix(&e, "removed %s, which failed its check", a.out);
    cli_fail(&e);
  }
  rc_quant_report_free(&rep);
  rc_dataset_free(&d);
  cli_samples_free(&s);
  rc_model_free(m);
  return rc;
}
