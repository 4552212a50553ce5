/* recoup prune DENSE.onnx --out STUDENT.onnx [...]: make a sparse or
 * narrower student from a dense model, for users who hold only the dense one. */
#include <cJSON.h>
#include <getopt.h>
#include <stdlib.h>
#include <string.h>

#include "cli/cli.h"
#include "recoup/prune.h"

static void usage(FILE *f) {
  fprintf(f,
          "Usage: recoup prune DENSE.onnx --out STUDENT.onnx [--sparsity S] [--scope global|layer]\n"
          "                    [--pattern N:M] [--channels F] [--include-first-last] [--json]\n"
          "\n"
          "Make a pruned student from a dense model: zero the smallest weights, keep N of\n"
          "every M along the input-channel axis, and/or remove whole output channels by\n"
          "L1 norm (rewriting every layer that reads them, so the file gets smaller).\n"
          "Prunable layers are Conv, ConvTranspose, Gemm and MatMul with a float weight\n"
          "initializer; biases and normalisation parameters are never zeroed. The written\n"
          "file is loaded and planned again before success is reported. Recover the lost\n"
          "accuracy with 'recoup distill', then validate on your own held-out data.\n"
          "A quantized (QDQ) model is refused: prune its float model, then quantize.\n"
          "\n"
          "Options:\n"
          "  -o, --out FILE          where to write the student (never over the input)\n"
          "  --sparsity S            fraction of weights set to zero, 0 <= S < 1\n"
          "  --scope global|layer    one magnitude threshold over all layers (default),\n"
          "                          or every layer to S\n"
          "  --pattern N:M           keep the N largest of every M weights along the\n"
          "                          input-channel axis (e.g. 2:4); other layers stay dense\n"
          "  --channels F            remove fraction F of the output channels of each layer\n"
          "                          (channels joined by residual adds go together; the\n"
          "                          last layer's outputs always stay)\n"
          "  --include-first-last    also sparsify the first and last layers\n"
          "  --json                  print one JSON object instead of tables\n"
          "  -h, --help              show this help\n");
}

static int parse_pattern(const char *s, int *n, int *m) {
  char *end;
  long a = strtol(s, &end, 10);
  if (end == s || *end != ':') return -1;
  const char *rest = end + 1;
  long b = strtol(rest, &end, 10);
  if (end == rest || *end || a < 1 || b < 2 || a >= b || b > 256) return -1;
  *n = (int)a;
  *m = (int)b;
  return 0;
}

static void shape_text(const rc_tensor *t, char *buf, size_t n) {
  size_t used = 0;
  buf[0] = '\0';
  for (int d = 0; d < t->rank && used < n; d++)
    used += (size_t)snprintf(buf + used, n - used, "%s%lld", d ? "x" : "", (long long)t->dims[d]);
}

static int same_dims(const rc_tensor *a, const rc_tensor *b) {
  for (int d = 0; d < a->rank; d++)
    if (a->dims[d] != b->dims[d]) return 0;
  return a->rank == b->rank;
}

static double pct(int64_t a, int64_t b) { return b ? 100.0 * (double)a / (double)b : 0.0; }

/* --sparsity S counts the layers it prunes; the first and last stay dense by
 * default, so where they hold many weights the whole model reaches less. A
 * note when it falls short of S by more than a tenth of S. */
static int sparsity_short(const rc_prune_opts *o, const rc_prune_report *r, char *note, size_t n) {
  double reached = r->weights_total ? (double)r->weights_zero / (double)r->weights_total : 0;
  if (o->sparsity <= 0 || reached >= 0.9 * o->sparsity || !r->weights_kept_dense) return 0;
  snprintf(note, n,
           "overall sparsity %.1f%% is well below the %.1f%% asked: the first and last layers hold %.1f%% of the "
           "prunable weights and stay dense (--include-first-last prunes them too)",
           100 * reached, 100 * o->sparsity, pct(r->weights_kept_dense, r->weights_total));
  return 1;
}

static void print_tables(const char *in, const char *out, const rc_prune_opts *o, const rc_prune_report *r) {
  int w = 5;
  for (int i = 0; i < r->n_layers; i++)
  {
    char nb[512];
    int len = cli_text_width(cli_esc(r->layers[i].layer, nb, sizeof nb));
    if (len > w) w = len;
  }
  printf("%-*s %-16s %-16s %9s %5s  %s\n", w, "layer", "weight before", "after", "sparsity", "N:M", "note");
  for (int i = 0; i < r->n_layers; i++) {
    const rc_prune_layer *l = &r->layers[i];
    char b[64], a[64], nm[16] = "-";
    shape_text(&l->before, b, sizeof b);
    if (same_dims(&l->before, &l->after)) snprintf(a, sizeof a, "=");
    else shape_text(&l->after, a, sizeof a);
    if (l->nm_m) snprintf(nm, sizeof nm, "%d:%d", l->nm_n, l->nm_m);
    char nb[512], nn[1024];
    cli_print_cell(stdout, cli_esc(l->layer, nb, sizeof nb), w);
    printf(" %-16s %-16s %8.1f%% %5s  %s\n", b, a, pct(l->zeros, rc_tensor_numel(&l->after)), nm,
           cli_esc(l->note, nn, sizeof nn));
  }
  char g1[32], g2[32], note[400];
  printf("\nweights      %s of %s zero (%.1f%% overall sparsity) over the prunable layers\n",
         cli_group_digits(r->weights_zero, g1, sizeof g1), cli_group_digits(r->weights_total, g2, sizeof g2),
         pct(r->weights_zero, r->weights_total));
  if (sparsity_short(o, r, note, sizeof note)) printf("note         %s\n", note);
  printf("parameters   %s -> ", cli_group_digits(r->params_before, g1, sizeof g1));
  printf("%s (%.1f%%)\n", cli_group_digits(r->params_after, g2, sizeof g2), pct(r->params_after, r->params_before));
  if (r->macs_before >= 0 && r->macs_after >= 0) {
    printf("MACs         %s -> ", cli_group_digits(r->macs_before, g1, sizeof g1));
    printf("%s per sample (%.1f%%)\n", cli_group_digits(r->macs_after, g2, sizeof g2),
           pct(r->macs_after, r->macs_before));
  }
  if (r->channels_removed) printf("channels     %lld output channels removed\n", (long long)r->channels_removed);
  char nb[1024], ob[1024];
  for (int i = 0; i < r->n_notes; i++) printf("note         %s\n", cli_esc(r->notes[i], nb, sizeof nb));
  printf("\nwrote %s (from %s; loaded and planned again at batch 1)\n", cli_esc(out, ob, sizeof ob),
         cli_esc(in, nb, sizeof nb));
  printf("Sparsity counts zeros; it does not make dense runtimes faster by itself. Recover\n"
         "accuracy with 'recoup distill' and validate on your own held-out data.\n");
}

static cJSON *dims_json(const rc_tensor *t) {
  cJSON *a = cJSON_CreateArray();
  for (int d = 0; d < t->rank; d++) cJSON_AddItemToArray(a, cJSON_CreateNumber((double)t->dims[d]));
  return a;
}

static void print_json(const char *in, const char *out, const rc_prune_opts *o, const rc_prune_report *r) {
  cJSON *root = cJSON_CreateObject();
  cJSON_AddStringToObject(root, "input", in);
  cJSON_AddStringToObject(root, "output", out);
  cJSON *req = cJSON_AddObjectToObject(root, "request");
  cJSON_AddNumberToObject(req, "sparsity", o->sparsity);
  cJSON_AddStringToObject(req, "scope", o->scope == RC_PRUNE_LAYER ? "layer" : "global");
  if (o->nm_m) {
    char nm[16];
    snprintf(nm, sizeof nm, "%d:%d", o->nm_n, o->nm_m);
    cJSON_AddStringToObject(req, "pattern", nm);
  } else {
    cJSON_AddNullToObject(req, "pattern");
  }
  cJSON_AddNumberToObject(req, "channels", o->channels);
  cJSON_AddBoolToObject(req, "include_first_last", o->include_first_last);
  cJSON *layers = cJSON_AddArrayToObject(root, "layers");
  for (int i = 0; i < r->n_layers; i++) {
    const rc_prune_layer *l = &r->layers[i];
    cJSON *j = cJSON_CreateObject();
    cJSON_AddStringToObject(j, "layer", l->layer);
    cJSON_AddStringToObject(j, "op", l->op_type);
    cJSON_AddStringToObject(j, "weight", l->weight);
    cJSON_AddItemToObject(j, "shape_before", dims_json(&l->before));
    cJSON_AddItemToObject(j, "shape_after", dims_json(&l->after));
    cJSON_AddNumberToObject(j, "zeros", (double)l->zeros);
    cJSON_AddNumberToObject(j, "total", (double)rc_tensor_numel(&l->after));
    if (l->nm_m) {
      char nm[16];
      snprintf(nm, sizeof nm, "%d:%d", l->nm_n, l->nm_m);
      cJSON_AddStringToObject(j, "pattern", nm);
    } else {
      cJSON_AddNullToObject(j, "pattern");
    }
    if (l->note[0]) cJSON_AddStringToObject(j, "note", l->note);
    else cJSON_AddNullToObject(j, "note");
    cJSON_AddItemToArray(layers, j);
  }
  cJSON *t = cJSON_AddObjectToObject(root, "totals");
  cJSON_AddNumberToObject(t, "weights", (double)r->weights_total);
  cJSON_AddNumberToObject(t, "weights_zero", (double)r->weights_zero);
  cJSON_AddNumberToObject(t, "overall_sparsity", r->weights_total ? (double)r->weights_zero / (double)r->weights_total : 0);
  cJSON_AddNumberToObject(t, "weights_kept_dense", (double)r->weights_kept_dense);
  cJSON_AddNumberToObject(t, "parameters_before", (double)r->params_before);
  cJSON_AddNumberToObject(t, "parameters_after", (double)r->params_after);
  cJSON_AddNumberToObject(t, "macs_batch_1_before", (double)r->macs_before);
  cJSON_AddNumberToObject(t, "macs_batch_1_after", (double)r->macs_after);
  cJSON_AddNumberToObject(t, "channels_removed", (double)r->channels_removed);
  cJSON *notes = cJSON_AddArrayToObject(root, "notes");
  for (int i = 0; i < r->n_notes; i++) cJSON_AddItemToArray(notes, cJSON_CreateString(r->notes[i]));
  char note[400];
  if (sparsity_short(o, r, note, sizeof note)) cJSON_AddItemToArray(notes, cJSON_CreateString(note));
  char *text = cli_json_print(root);
  if (text) puts(text);
  free(text);
  cJSON_Delete(root);
}

int rc_cmd_prune(int argc, char **argv) {
  enum { O_SPARSITY = 256, O_SCOPE, O_PATTERN, O_CHANNELS, O_EDGES, O_JSON };
  static const struct option longopts[] = {{"out", required_argument, NULL, 'o'},
                                           {"sparsity", required_argument, NULL, O_SPARSITY},
                                           {"scope", required_argument, NULL, O_SCOPE},
                                           {"pattern", required_argument, NULL, O_PATTERN},
                                           {"channels", required_argument, NULL, O_CHANNELS},
                                           {"include-first-last", no_argument, NULL, O_EDGES},
                                           {"json", no_argument, NULL, O_JSON},
                                           {"help", no_argument, NULL, 'h'},
                                           {NULL, 0, NULL, 0}};
  rc_prune_opts o;
  rc_prune_opts_init(&o);
  const char *out = NULL;
  int json = 0, c;
  optind = 1;
  while ((c = getopt_long(argc, argv, "ho:", longopts, NULL)) != -1) {
    switch (c) {
      case 'o': out = optarg; break;
      case O_SPARSITY:
        if (cli_parse_float(optarg, &o.sparsity) || o.sparsity < 0 || o.sparsity >= 1)
          return cli_usage_error("prune", "--sparsity expects a fraction 0 <= S < 1, not '%s'", optarg);
        break;
      case O_SCOPE:
        if (!strcmp(optarg, "global")) o.scope = RC_PRUNE_GLOBAL;
        else if (!strcmp(optarg, "layer")) o.scope = RC_PRUNE_LAYER;
        else return cli_usage_error("prune", "--scope expects global or layer, not '%s'", optarg);
        break;
      case O_PATTERN:
        if (parse_pattern(optarg, &o.nm_n, &o.nm_m))
          return cli_usage_error("prune", "--pattern expects N:M with 1 <= N < M <= 256, not '%s'", optarg);
        break;
      case O_CHANNELS:
        if (cli_parse_float(optarg, &o.channels) || o.channels < 0 || o.channels >= 1)
          return cli_usage_error("prune", "--channels expects a fraction 0 <= F < 1, not '%s'", optarg);
        break;
      case O_EDGES: o.include_first_last = 1; break;
      case O_JSON: json = 1; break;
      case 'h': usage(stdout); return RC_EXIT_OK;
      default: return cli_bad_option("prune", argv, longopts);
    }
  }
  if (optind != argc - 1) return cli_usage_error("prune", "expects exactly one DENSE.onnx");
  if (!out) return cli_usage_error("prune", "--out STUDENT.onnx is required");
  if (o.sparsity == 0 && o.nm_m == 0 && o.channels == 0)
    return cli_usage_error("prune", "nothing to do: give --sparsity, --pattern or --channels");
  const char *in = argv[optind];
  rc_err e = {0};
  rc_prune_report r;
  if (rc_prune_file(in, out, &o, &r, &e) != RC_OK) return cli_fail(&e);
  if (json) print_json(in, out, &o, &r);
  else print_tables(in, out, &o, &r);
  rc_prune_report_free(&r);
  return RC_EXIT_OK;
}
