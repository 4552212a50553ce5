/* recoup inspect MODEL.onnx [--json]: what a model is made of. */
#include <cJSON.h>
#include <getopt.h>
#include <stdlib.h>
#include <string.h>

#include "cli/cli.h"
#include "cli/weight_rules.h"
#include "recoup/model.h"
#include "recoup/pairing.h"

static void usage(FILE *f) {
  fprintf(f,
          "Usage: recoup inspect MODEL.onnx [--mask auto|zeros|none] [--json]\n"
          "       recoup inspect --pairs DENSE.onnx STUDENT.onnx [--pair T=S ...] [--json]\n"
          "\n"
          "Show a model's inputs and outputs (shapes, dtypes), IR version and opset,\n"
          "op counts, parameter count, per-tensor weight sparsity with any N:M pattern,\n"
          "quantization grids (dtype, scale, zero point, axis, integer range and where\n"
          "the range comes from: the dtype, recorded in the file by recoup quantize, or\n"
          "observed from the integers the tensor holds), what each weight's zeros mean\n"
          "to distill (pruned and kept at zero, or trainable; see --mask) and\n"
          "multiply-accumulates for a batch of one.\n"
          "\n"
          "With --pairs: the teacher and student tensors feature losses would match\n"
          "(automatic pairing, or the --pair overrides), with their shapes at batch 1\n"
          "and whether a projector bridges different widths.\n"
          "\n"
          "Options:\n"
          "  --json      print one JSON object on stdout instead of tables\n"
          "  --mask M    what zeros mean, as distill --mask M decides it (default auto)\n"
          "  --pairs     show the pairing of two models\n"
          "  --pair T=S  pair teacher tensor T with student tensor S (repeatable)\n"
          "  -h, --help  show this help\n");
}

typedef struct op_count {
  const char *op;
  int n;
} op_count;

/* Nodes per op type (every domain together), in order of first appearance. */
static int count_ops(const rc_model_op_count *c, int n_c, op_count *counts) {
  int n = 0;
  for (int i = 0; i < n_c; i++) {
    int k = 0;
    while (k < n && strcmp(counts[k].op, c[i].op_type)) k++;
    if (k == n) counts[n++] = (op_count){c[i].op_type, 0};
    counts[k].n += c[i].count;
  }
  return n;
}

static const char *role_name(rc_weight_kind r) {
  return r == RC_WEIGHT_BIAS ? "bias" : r == RC_WEIGHT_NORM ? "norm" : r == RC_WEIGHT_AFFINE ? "affine" : "weight";
}

static cJSON *shape_json(const rc_tensor *t) {
  cJSON *a = cJSON_CreateArray();
  for (int i = 0; i < t->rank; i++)
    cJSON_AddItemToArray(a, t->dims[i] >= 0 ? cJSON_CreateNumber((double)t->dims[i]) : cJSON_CreateNull());
  return a;
}

/* What inspect shows for a graph input or output: the file's declaration,
 * or, where it declares no type or shape, what planning computes. */
typedef struct io_shape {
  rc_io_decl d;
  int computed;      /* 1: dtype or shape came from the planner */
  const char *why;   /* no shape at all: the reason */
} io_shape;

/* The first symbolic dim name of the inputs ("N"): how the computed batch
 * axis is written. */
static const char *batch_name(const rc_model *m) {
  for (int i = 0; i < rc_model_n_inputs(m); i++) {
    rc_io_decl d;
    rc_err ignored;
    if (rc_model_declared(m, 0, i, &d, &ignored) != RC_OK) continue;
    for (int k = 0; k < d.rank; k++)
      if (d.dim_names[k]) return d.dim_names[k];
  }
  return "?";
}

/* Output shapes of m for its declared inputs with symbolic dims taken as b;
 * NULL (pe set) when it does not plan. Free with free(). */
static rc_tensor *outputs_at(const rc_model *m, int64_t b, rc_err *pe) {
  rc_tensor *ins = calloc((size_t)rc_model_n_inputs(m) + 1, sizeof *ins);
  rc_tensor *outs = calloc((size_t)rc_model_n_outputs(m) + 1, sizeof *outs);
  if (ins && outs) {
    rc_model_batch_inputs(m, b, ins);
    if (rc_model_output_shapes(m, ins, outs, pe) == RC_OK) {
      free(ins);
      return outs;
    }
  }
  free(ins);
  free(outs);
  return NULL;
}

/* Outputs the file leaves undeclared: plan at batch 1 and 2; dims that
 * follow the batch are written with the inputs' symbolic name. */
static void io_shapes(const rc_model *m, int is_output, io_shape *out, int n, rc_err *pe) {
  int need = 0;
  for (int i = 0; i < n; i++) {
    rc_err ignored;
    memset(&out[i], 0, sizeof out[i]);
    rc_model_declared(m, is_output, i, &out[i].d, &ignored);
    if (is_output && (!out[i].d.dtype || out[i].d.rank < 0)) need = 1;
  }
  if (!need) return;
  rc_err e2 = {0};
  rc_tensor *o1 = outputs_at(m, 1, pe), *o2 = o1 ? outputs_at(m, 2, &e2) : NULL;
  if (o1) {
    const char *bn = batch_name(m);
    for (int i = 0; i < n; i++) {
      rc_io_decl *d = &out[i].d;
      if (d->dtype && d->rank >= 0) continue;
      const rc_tensor *t1 = &o1[i], *t2 = o2 ? &o2[i] : NULL;
      out[i].computed = 1;
      if (!d->dtype) d->dtype = t1->dtype;
      if (d->rank < 0) {
        d->rank = t1->rank;
        for (int k = 0; k < t1->rank; k++) {
          d->dims[k] = t1->dims[k];
          d->dim_names[k] = NULL;
          if (t2 && t2->rank == t1->rank && t2->dims[k] != t1->dims[k]) {
            d->dims[k] = -1;
            d->dim_names[k] = bn;
          }
        }
      }
    }
  } else {
    for (int i = 0; i < n; i++)
      if (!out[i].d.dtype || out[i].d.rank < 0) out[i].why = pe->msg[0] ? pe->msg : "out of memory";
  }
  free(o1);
  free(o2);
}

/* "float32 (N, 10)", "(computed)" appended where the planner supplied it. */
static const char *io_text(const io_shape *s, char *buf, size_t n) {
  const rc_io_decl *d = &s->d;
  size_t o = (size_t)snprintf(buf, n, "%s ", d->dtype ? rc_dtype_name(d->dtype) : "undeclared-type");
  if (d->rank < 0) {
    snprintf(buf + o, n - o, "shape unknown%s%s%s", s->why ? " (" : "", s->why ? s->why : "", s->why ? ")" : "");
    return buf;
  }
  o += (size_t)snprintf(buf + o, n - o, "(");
  for (int k = 0; k < d->rank && o < n; k++) {
    char nb[64];
    if (d->dims[k] >= 0) o += (size_t)snprintf(buf + o, n - o, "%s%lld", k ? ", " : "", (long long)d->dims[k]);
    else o += (size_t)snprintf(buf + o, n - o, "%s%s", k ? ", " : "", d->dim_names[k] ? cli_esc(d->dim_names[k], nb, sizeof nb) : "?");
  }
  if (o < n) snprintf(buf + o, n - o, ")%s", s->computed ? " (computed)" : "");
  return buf;
}

static cJSON *io_json(const io_shape *sh, int n) {
  cJSON *arr = cJSON_CreateArray();
  for (int i = 0; i < n; i++) {
    const rc_io_decl *d = &sh[i].d;
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "name", d->name);
    if (d->dtype) cJSON_AddStringToObject(o, "dtype", rc_dtype_name(d->dtype));
    else cJSON_AddNullToObject(o, "dtype");
    if (d->rank >= 0) {
      cJSON *a = cJSON_AddArrayToObject(o, "shape");
      for (int k = 0; k < d->rank; k++)
        cJSON_AddItemToArray(a, d->dims[k] >= 0 ? cJSON_CreateNumber((double)d->dims[k])
                                : d->dim_names[k] ? cJSON_CreateString(d->dim_names[k]) : cJSON_CreateNull());
    } else {
      cJSON_AddNullToObject(o, "shape");
    }
    cJSON_AddStringToObject(o, "source", sh[i].computed ? "computed" : d->rank >= 0 || d->dtype ? "file" : "none");
    cJSON_AddItemToArray(arr, o);
  }
  return arr;
}

/* Everything inspect shows about one model. */
typedef struct facts {
  io_shape *ins, *outs;
  int n_ins, n_outs;
  op_count *ops;
  int n_ops, n_nodes;
  int64_t params, macs;
  const char *macs_why;
  rc_model_weight *w;
  int n_w;
  rc_mask_mode mode;
  rc_mask_choice *masks; /* per weight; rule NULL for biases and normalisation */
  rc_model_grid *gr;
  int n_gr;
  rc_int_range *ranges;  /* per grid */
  int64_t **zero_points; /* per grid, n_scale each */
} facts;

static void print_json(const rc_model *m, const facts *f) {
  cJSON *root = cJSON_CreateObject();
  cJSON_AddStringToObject(root, "model", rc_model_path(m));
  cJSON_AddNumberToObject(root, "file_bytes", (double)rc_model_file_bytes(m));
  cJSON_AddNumberToObject(root, "ir_version", (double)rc_model_ir_version(m));
  cJSON_AddNumberToObject(root, "opset", rc_model_opset(m));
  cJSON_AddItemToObject(root, "inputs", io_json(f->ins, f->n_ins));
  cJSON_AddItemToObject(root, "outputs", io_json(f->outs, f->n_outs));
  cJSON *jops = cJSON_AddObjectToObject(root, "ops");
  for (int i = 0; i < f->n_ops; i++) cJSON_AddNumberToObject(jops, f->ops[i].op, f->ops[i].n);
  cJSON_AddNumberToObject(root, "nodes", f->n_nodes);
  cJSON_AddNumberToObject(root, "parameters", (double)f->params);
  if (f->macs >= 0)
    cJSON_AddNumberToObject(root, "macs_batch_1", (double)f->macs);
  else
    cJSON_AddNullToObject(root, "macs_batch_1");
  cJSON *jw = cJSON_AddArrayToObject(root, "weights");
  for (int i = 0; i < f->n_w; i++) {
    const rc_model_weight *w = &f->w[i];
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "name", w->name);
    cJSON_AddStringToObject(o, "layer", w->layer);
    cJSON_AddStringToObject(o, "role", role_name(w->kind));
    cJSON_AddStringToObject(o, "dtype", rc_dtype_name(w->shape.dtype));
    cJSON_AddItemToObject(o, "shape", shape_json(&w->shape));
    cJSON_AddNumberToObject(o, "zeros", (double)w->zeros);
    cJSON_AddNumberToObject(o, "total", (double)w->numel);
    cJSON_AddNumberToObject(o, "sparsity", w->sparsity);
    if (w->nm_m) {
      char nm[16];
      snprintf(nm, sizeof nm, "%d:%d", w->nm_n, w->nm_m);
      cJSON_AddStringToObject(o, "pattern", nm);
    } else {
      cJSON_AddNullToObject(o, "pattern");
    }
    cJSON_AddBoolToObject(o, "quantized", w->quantized);
    if (f->masks[i].rule) cJSON_AddItemToObject(o, "mask", cli_mask_json(&f->masks[i]));
    else cJSON_AddNullToObject(o, "mask");
    cJSON_AddItemToArray(jw, o);
  }
  cJSON_AddStringToObject(root, "mask_mode", rc_mask_mode_name(f->mode));
  cJSON *jg = cJSON_AddArrayToObject(root, "grids");
  for (int i = 0; i < f->n_gr; i++) {
    const rc_model_grid *g = &f->gr[i];
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "tensor", g->tensor);
    cJSON_AddStringToObject(o, "node", g->node);
    cJSON_AddStringToObject(o, "kind", g->is_weight ? "weight" : "activation");
    cJSON_AddStringToObject(o, "dtype", rc_dtype_name(g->dtype));
    if (g->axis >= 0)
      cJSON_AddNumberToObject(o, "axis", g->axis);
    else
      cJSON_AddNullToObject(o, "axis");
    cJSON *sc = cJSON_AddArrayToObject(o, "scale");
    cJSON *zp = cJSON_AddArrayToObject(o, "zero_point");
    for (int64_t k = 0; k < g->n_scale; k++) {
      cJSON_AddItemToArray(sc, cJSON_CreateNumber(g->scale ? g->scale[k] : 0));
      cJSON_AddItemToArray(zp, cJSON_CreateNumber((double)f->zero_points[i][k]));
    }
    cJSON_AddItemToObject(o, "range", cli_range_json(&f->ranges[i]));
    cJSON_AddItemToArray(jg, o);
  }
  char *text = cli_json_print(root);
  if (text) puts(text);
  free(text);
  cJSON_Delete(root);
}

static int name_width(const io_shape *sh, int n, int lo, int hi) {
  int w = lo;
  for (int i = 0; i < n; i++) {
    char nb[512];
    int len = cli_text_width(cli_esc(sh[i].d.name, nb, sizeof nb));
    if (len > w) w = len;
  }
  return w < hi ? w : hi;
}

static void print_io(const char *title, const io_shape *sh, int n, int width) {
  for (int i = 0; i < n; i++) {
    char buf[512], nb[512];
    printf("%-11s ", i ? "" : title);
    cli_print_cell(stdout, cli_esc(sh[i].d.name, nb, sizeof nb), width);
    printf("  %s\n", io_text(&sh[i], buf, sizeof buf));
  }
}

static void print_grids(const facts *f) {
  char nb[512];
  printf("\n%-36s %-10s %-6s %-5s %-30s %s\n", "grid (integer tensor)", "kind", "dtype", "axis",
         "integer range (from; used)", "scale / zero point");
  for (int i = 0; i < f->n_gr; i++) {
    const rc_model_grid *g = &f->gr[i];
    const rc_int_range *r = &f->ranges[i];
    char axis[16] = "-", rg[96], used[48] = "";
    if (g->axis >= 0) snprintf(axis, sizeof axis, "%d", g->axis);
    if (r->has_used) snprintf(used, sizeof used, "; [%lld, %lld]", (long long)r->used_lo, (long long)r->used_hi);
    snprintf(rg, sizeof rg, "[%d, %d] (%s%s)", r->lo, r->hi, rc_range_source_name(r->source), used);
    printf("%-36s %-10s %-6s %-5s %-30s ", cli_esc(g->tensor, nb, sizeof nb),
           g->is_weight ? "weight" : "activation", rc_dtype_name(g->dtype), axis, rg);
    double zp0 = g->n_scale ? (double)f->zero_points[i][0] : 0.0;
    if (g->n_scale == 1)
      printf("%.9g / %g\n", g->scale ? g->scale[0] : 0.0, zp0);
    else
      printf("%lld per-axis scales, first %.9g / %g\n", (long long)g->n_scale, g->scale ? g->scale[0] : 0.0, zp0);
  }
}

static void print_tables(const rc_model *m, const facts *f) {
  char b1[64], b2[64], nb[512];
  printf("model       %s (%s bytes)\n", cli_esc(rc_model_path(m), nb, sizeof nb),
         cli_group_digits((long long)rc_model_file_bytes(m), b1, sizeof b1));
  printf("format      ONNX IR version %lld, default-domain opset %d\n", (long long)rc_model_ir_version(m),
         rc_model_opset(m));
  int iow = name_width(f->ins, f->n_ins, 8, 60);
  int w2 = name_width(f->outs, f->n_outs, 8, 60);
  if (w2 > iow) iow = w2;
  print_io("inputs", f->ins, f->n_ins, iow);
  print_io("outputs", f->outs, f->n_outs, iow);
  printf("nodes       %d:", f->n_nodes);
  for (int i = 0; i < f->n_ops; i++)
    printf("%s %s %d", i ? "," : "", cli_esc(f->ops[i].op, nb, sizeof nb), f->ops[i].n);
  printf("\nparameters  %s\n", cli_group_digits(f->params, b1, sizeof b1));
  if (f->macs >= 0)
    printf("MACs        %s per sample\n", cli_group_digits(f->macs, b2, sizeof b2));
  else
    printf("MACs        unknown (%s)\n", cli_esc(f->macs_why, nb, sizeof nb));
  if (f->n_w) {
    printf("\n%-36s %-7s %-18s %13s %9s %7s  zeros under --mask %s\n", "weight", "role", "shape", "zeros/total",
           "sparsity", "N:M", rc_mask_mode_name(f->mode));
    for (int i = 0; i < f->n_w; i++) {
      const rc_model_weight *w = &f->w[i];
      char shape[96], frac[48], nm[16] = "-";
      if (w->nm_m) snprintf(nm, sizeof nm, "%d:%d", w->nm_n, w->nm_m);
      snprintf(frac, sizeof frac, "%lld/%lld", (long long)w->zeros, (long long)w->numel);
      char mk[160] = "-";
      if (f->masks[i].rule) cli_mask_text(&f->masks[i], mk, sizeof mk);
      printf("%-36s %-7s %-18s %13s %8.1f%% %7s  %s%s\n", cli_esc(w->name, nb, sizeof nb), role_name(w->kind),
             rc_shape_str(&w->shape, shape, sizeof shape), frac,
             w->numel ? 100.0 * (double)w->zeros / (double)w->numel : 0.0, nm, mk,
             w->quantized ? "  (quantized)" : "");
    }
  }
  if (f->n_gr) print_grids(f);
}

static const char *matched_by(const rc_model_pair *p) {
  return p->given ? "given" : p->by_name ? "name" : "position";
}

static void print_pairs_json(const rc_model_pair *pairs, int n) {
  cJSON *arr = cJSON_CreateArray();
  for (int i = 0; i < n; i++) {
    const rc_model_pair *p = &pairs[i];
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "teacher", p->teacher);
    cJSON_AddStringToObject(o, "student", p->student);
    cJSON_AddItemToObject(o, "teacher_shape", shape_json(&p->teacher_shape));
    cJSON_AddItemToObject(o, "student_shape", shape_json(&p->student_shape));
    cJSON_AddStringToObject(o, "matched_by", matched_by(p));
    cJSON_AddBoolToObject(o, "projector", p->projector);
    cJSON_AddItemToArray(arr, o);
  }
  char *text = cli_json_print(arr);
  if (text) puts(text);
  free(text);
  cJSON_Delete(arr);
}

static void print_pairs_table(const rc_model_pair *pairs, int n) {
  /* Columns as wide as their longest entry, so long names keep the table aligned. */
  int wt = (int)strlen("teacher tensor"), ws = (int)strlen("student tensor"), wts = 5, wss = 5;
  for (int i = 0; i < n; i++) {
    const rc_model_pair *p = &pairs[i];
    char nb[512], a[96];
    int l = cli_text_width(cli_esc(p->teacher, nb, sizeof nb));
    if (l > wt) wt = l;
    if ((l = cli_text_width(cli_esc(p->student, nb, sizeof nb))) > ws) ws = l;
    if ((l = (int)strlen(rc_shape_str(&p->teacher_shape, a, sizeof a))) > wts) wts = l;
    if ((l = (int)strlen(rc_shape_str(&p->student_shape, a, sizeof a))) > wss) wss = l;
  }
  printf("%-*s  %-*s  %-*s  %-*s  %-8s  %s\n", wt, "teacher tensor", wts, "shape", ws, "student tensor", wss,
         "shape", "matched", "projector");
  for (int i = 0; i < n; i++) {
    const rc_model_pair *p = &pairs[i];
    char a[96], b[96], n1[512], n2[512];
    cli_print_cell(stdout, cli_esc(p->teacher, n1, sizeof n1), wt);
    printf("  %-*s  ", wts, rc_shape_str(&p->teacher_shape, a, sizeof a));
    cli_print_cell(stdout, cli_esc(p->student, n2, sizeof n2), ws);
    printf("  %-*s  %-8s  %s\n", wss, rc_shape_str(&p->student_shape, b, sizeof b), matched_by(p),
           p->projector ? "yes" : "no");
  }
  if (!n) printf("no pairs: give them with --pair TEACHER_TENSOR=STUDENT_TENSOR\n");
}

static int inspect_pairs(const char *tpath, const char *spath, const char *const *pairs, int n_pairs, int json) {
  rc_err e = {0};
  rc_model *t = NULL, *s = NULL;
  rc_model_pair *list = NULL;
  int n = 0, rc = RC_EXIT_FAIL;
  if (rc_model_load(&t, tpath, NULL, &e) == RC_OK && rc_model_load(&s, spath, NULL, &e) == RC_OK &&
      rc_model_pairs(&list, &n, t, s, pairs, n_pairs, &e) == RC_OK) {
    if (json)
      print_pairs_json(list, n);
    else
      print_pairs_table(list, n);
    rc = RC_EXIT_OK;
  }
  if (rc != RC_EXIT_OK) cli_fail(&e);
  rc_model_list_free(list);
  rc_model_free(t);
  rc_model_free(s);
  return rc;
}

static void facts_free(facts *f) {
  for (int i = 0; f->zero_points && i < f->n_gr; i++) free(f->zero_points[i]);
  free(f->zero_points);
  free(f->ins);
  free(f->outs);
  free(f->ops);
  rc_model_list_free(f->w);
  rc_model_list_free(f->masks);
  rc_model_list_free(f->gr);
  rc_model_list_free(f->ranges);
}

static rc_status collect_zero_points(facts *f, const rc_model *m, rc_err *e) {
  f->zero_points = calloc((size_t)f->n_gr + 1, sizeof *f->zero_points);
  if (!f->zero_points) return rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  for (int i = 0; i < f->n_gr; i++) {
    if (!(f->zero_points[i] = calloc((size_t)f->gr[i].n_scale + 1, sizeof **f->zero_points)))
      return rc_err_set(e, RC_ERR_NOMEM, "out of memory");
    RC_TRY(rc_model_grid_zero_points(m, i, f->zero_points[i], e));
  }
  return RC_OK;
}

static rc_status collect(facts *f, const rc_model *m, rc_err *pe, rc_err *se, rc_err *e) {
  rc_model_op_count *counts = NULL;
  int n_counts = 0;
  RC_TRY(rc_model_op_counts(m, &counts, &n_counts, e));
  f->ops = calloc((size_t)n_counts + 1, sizeof *f->ops);
  if (f->ops) f->n_ops = count_ops(counts, n_counts, f->ops);
  for (int i = 0; i < n_counts; i++) f->n_nodes += counts[i].count;
  rc_model_list_free(counts);
  if (!f->ops) return rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  RC_TRY(rc_model_weights(m, &f->w, &f->n_w, e));
  RC_TRY(rc_model_grids(m, &f->gr, &f->n_gr, e));
  RC_TRY(rc_model_grid_ranges(m, &f->ranges, &f->n_gr, e));
  RC_TRY(rc_model_masks(m, f->mode, &f->masks, &f->n_w, e));
  RC_TRY(collect_zero_points(f, m, e));
  f->params = rc_model_params(m);
  if (rc_model_macs(m, &f->macs, pe) != RC_OK) f->macs = -1;
  f->macs_why = pe->msg;
  f->n_ins = rc_model_n_inputs(m);
  f->n_outs = rc_model_n_outputs(m);
  f->ins = calloc((size_t)f->n_ins + 1, sizeof *f->ins);
  f->outs = calloc((size_t)f->n_outs + 1, sizeof *f->outs);
  if (!f->ins || !f->outs) return rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  io_shapes(m, 0, f->ins, f->n_ins, se);
  io_shapes(m, 1, f->outs, f->n_outs, se);
  return RC_OK;
}

int rc_cmd_inspect(int argc, char **argv) {
  static const struct option longopts[] = {{"json", no_argument, NULL, 'j'},
                                           {"mask", required_argument, NULL, 'M'},
                                           {"pairs", no_argument, NULL, 'p'},
                                           {"pair", required_argument, NULL, 'P'},
                                           {"help", no_argument, NULL, 'h'},
                                           {NULL, 0, NULL, 0}};
  int json = 0, want_pairs = 0, n_pairs = 0, c;
  facts f;
  memset(&f, 0, sizeof f);
  f.mode = RC_MASK_AUTO;
  const char *pairs[64];
  optind = 1;
  while ((c = getopt_long(argc, argv, "h", longopts, NULL)) != -1) {
    if (c == 'j') json = 1;
    else if (c == 'M') {
      if (!rc_mask_mode_parse(optarg, &f.mode))
        return cli_usage_error("inspect", "--mask must be auto, zeros or none, not '%s'", optarg);
    }
    else if (c == 'p') want_pairs = 1;
    else if (c == 'P') {
      if (n_pairs == 64) return cli_usage_error("inspect", "too many --pair");
      pairs[n_pairs++] = optarg;
    } else if (c == 'h') {
      usage(stdout);
      return RC_EXIT_OK;
    } else
      return cli_bad_option("inspect", argv, longopts);
  }
  if (want_pairs) {
    if (optind != argc - 2) return cli_usage_error("inspect", "--pairs expects DENSE.onnx STUDENT.onnx");
    return inspect_pairs(argv[optind], argv[optind + 1], pairs, n_pairs, json);
  }
  if (n_pairs) return cli_usage_error("inspect", "--pair needs --pairs");
  if (optind != argc - 1) return cli_usage_error("inspect", "expects exactly one MODEL.onnx");
  rc_err e = {0}, pe = {0}, se = {0};
  rc_model *m = NULL;
  if (rc_model_load(&m, argv[optind], NULL, &e) != RC_OK) return cli_fail(&e);
  int rc = RC_EXIT_OK;
  if (collect(&f, m, &pe, &se, &e) != RC_OK)
    rc = cli_fail(&e);
  else if (json)
    print_json(m, &f);
  else
    print_tables(m, &f);
  facts_free(&f);
  rc_model_free(m);
  return rc;
}
