/* recoup inspect MODEL.onnx [--json]: what a model is made of. */
#include <cJSON.h>
#include <getopt.h>
#include <stdlib.h>
#include <string.h>

#include "cli/cli.h"
#include "cli/weight_rules.h"
#include "core/alloc.h"
#include "onnx/io_decl.h"
#include "onnx/model.h"
#include "plan/count.h"
#include "plan/grid_range.h"
#include "plan/inspect.h"
#include "plan/load.h"
#include "plan/mask_rule.h"
#include "plan/plan.h"
#include "train/pairing.h"

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

static int count_ops(const rc_graph *g, op_count *counts) {
  int n = 0;
  for (int i = 0; i < g->n_nodes; i++) {
    int k = 0;
    while (k < n && strcmp(counts[k].op, g->nodes[i].op_type)) k++;
    if (k == n) counts[n++] = (op_count){g->nodes[i].op_type, 0};
    counts[k].n++;
  }
  return n;
}

static const char *role_name(rc_weight_role r) {
  return r == RC_ROLE_BIAS ? "bias" : r == RC_ROLE_NORM ? "norm" : r == RC_ROLE_AFFINE ? "affine" : "weight";
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
  const rc_graph *g = &m->graph;
  for (int i = 0; i < g->n_inputs; i++) {
    rc_io_decl d;
    if (rc_model_io_decl(m, 0, 0, g->values[g->inputs[i]].name, &d, NULL) != RC_OK) continue;
    for (int k = 0; k < d.rank; k++)
      if (d.dim_names[k]) return d.dim_names[k];
  }
  return "?";
}

/* Outputs the file leaves undeclared: plan at batch 1 and 2; dims that
 * follow the batch are written with the inputs' symbolic name. */
static void io_shapes(const rc_model *m, int is_output, io_shape *out, int n, rc_err *pe) {
  const rc_graph *g = &m->graph;
  const int *vals = is_output ? g->outputs : g->inputs;
  int need = 0;
  for (int i = 0; i < n; i++) {
    memset(&out[i], 0, sizeof out[i]);
    rc_model_io_decl(m, is_output, i, g->values[vals[i]].name, &out[i].d, NULL);
    if (is_output && (!out[i].d.dtype || out[i].d.rank < 0)) need = 1;
  }
  if (!need) return;
  rc_tensor *s1 = rc__batch_inputs(g, 1), *s2 = rc__batch_inputs(g, 2);
  rc_plan *p1 = NULL, *p2 = NULL;
  rc_err e2 = {0};
  if (s1 && s2 && rc_plan_init(&p1, g, s1, NULL, pe) == RC_OK) {
    if (rc_plan_init(&p2, g, s2, NULL, &e2) != RC_OK) p2 = NULL;
    const char *bn = batch_name(m);
    for (int i = 0; i < n; i++) {
      rc_io_decl *d = &out[i].d;
      if (d->dtype && d->rank >= 0) continue;
      const rc_tensor *t1 = rc_plan_tensor(p1, vals[i]), *t2 = p2 ? rc_plan_tensor(p2, vals[i]) : NULL;
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
  rc_plan_free(p1);
  rc_plan_free(p2);
  rc__free(s1);
  rc__free(s2);
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

static cJSON *io_json(const rc_model *m, int is_output, const io_shape *sh) {
  const rc_graph *g = &m->graph;
  const int *vals = is_output ? g->outputs : g->inputs;
  int n = is_output ? g->n_outputs : g->n_inputs;
  cJSON *arr = cJSON_CreateArray();
  for (int i = 0; i < n; i++) {
    const rc_io_decl *d = &sh[i].d;
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "name", g->values[vals[i]].name);
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

static double zero_point_at(const rc_grid_info *gi, int64_t i) {
  return gi->zero_point && gi->zero_point->data ? (double)rc__int_at(gi->zero_point, i) : 0.0;
}

/* What distill would decide for each weight and grid. */
typedef struct grid_facts {
  rc_mask_mode mode;
  rc_mask_choice *masks; /* per weight; rule NULL for biases and normalisation */
  rc_int_range *ranges;  /* per grid */
} grid_facts;

static const rc_grid_info *grid_of_value(const rc_grid_info *gr, int n_gr, int v) {
  for (int i = 0; i < n_gr; i++)
    if (gr[i].is_weight && gr[i].value == v) return &gr[i];
  return NULL;
}

static rc_status decide(const rc_model *m, const rc_weight_info *w, int n_w, const rc_grid_info *gr, int n_gr,
                        grid_facts *f, rc_err *e) {
  const rc_graph *g = &m->graph;
  rc_file_notes notes;
  RC_TRY(rc__file_notes_parse(&notes, rc_model_metadata(m, RC_RANGES_METADATA),
                              rc_model_metadata(m, RC_PRUNED_METADATA), g->path, e));
  rc_status s = RC_OK;
  f->masks = rc__calloc((size_t)n_w + 1, sizeof *f->masks);
  f->ranges = rc__calloc((size_t)n_gr + 1, sizeof *f->ranges);
  if (!f->masks || !f->ranges) s = rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  for (int i = 0; s == RC_OK && i < n_gr; i++) {
    s = rc__grid_range(g, &notes, gr[i].is_weight ? gr[i].value : -1, gr[i].dtype, g->values[gr[i].value].name,
                       &f->ranges[i], e);
    int q = g->values[gr[i].value].producer; /* a float weight quantized at run time */
    if (s == RC_OK && !gr[i].is_weight && q >= 0 && !strcmp(g->nodes[q].op_type, "QuantizeLinear") &&
        f->ranges[i].source == RC_RANGE_DTYPE)
      rc__grid_range_of_float_weight(g, q, &f->ranges[i]);
  }
  for (int i = 0; s == RC_OK && i < n_w; i++) {
    if (w[i].role != RC_ROLE_WEIGHT) continue;
    const rc_value *v = &g->values[w[i].value];
    const rc_grid_info *q = w[i].quantized ? grid_of_value(gr, n_gr, w[i].value) : NULL;
    int64_t channels = 1, inner = 1;
    if (q && q->axis >= 0) {
      channels = q->n_scale;
      for (int d = q->axis + 1; d < v->decl.rank; d++) inner *= v->decl.dims[d];
    }
    rc__mask_choose(f->mode, &notes, v->name, &v->decl, q != NULL, q ? q->zero_point : NULL, channels, inner,
                    &f->masks[i]);
  }
  rc__file_notes_free(&notes);
  return s;
}

static void print_json(const rc_model *m, const io_shape *ins, const io_shape *outs, const op_count *ops, int n_ops,
                       const rc_weight_info *w, int n_w, const rc_grid_info *gr, int n_gr, int64_t macs,
                       const grid_facts *f) {
  const rc_graph *g = &m->graph;
  cJSON *root = cJSON_CreateObject();
  cJSON_AddStringToObject(root, "model", m->path);
  cJSON_AddNumberToObject(root, "file_bytes", (double)m->file_bytes);
  cJSON_AddNumberToObject(root, "ir_version", (double)g->ir_version);
  cJSON_AddNumberToObject(root, "opset", g->opset);
  cJSON_AddItemToObject(root, "inputs", io_json(m, 0, ins));
  cJSON_AddItemToObject(root, "outputs", io_json(m, 1, outs));
  cJSON *jops = cJSON_AddObjectToObject(root, "ops");
  for (int i = 0; i < n_ops; i++) cJSON_AddNumberToObject(jops, ops[i].op, ops[i].n);
  cJSON_AddNumberToObject(root, "nodes", g->n_nodes);
  cJSON_AddNumberToObject(root, "parameters", (double)rc__graph_params(g));
  if (macs >= 0)
    cJSON_AddNumberToObject(root, "macs_batch_1", (double)macs);
  else
    cJSON_AddNullToObject(root, "macs_batch_1");
  cJSON *jw = cJSON_AddArrayToObject(root, "weights");
  for (int i = 0; i < n_w; i++) {
    const rc_value *v = &g->values[w[i].value];
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "name", v->name);
    cJSON_AddStringToObject(o, "layer", g->nodes[w[i].node].label);
    cJSON_AddStringToObject(o, "role", role_name(w[i].role));
    cJSON_AddStringToObject(o, "dtype", rc_dtype_name(v->decl.dtype));
    cJSON_AddItemToObject(o, "shape", shape_json(&v->decl));
    cJSON_AddNumberToObject(o, "zeros", (double)w[i].zeros);
    cJSON_AddNumberToObject(o, "total", (double)w[i].numel);
    cJSON_AddNumberToObject(o, "sparsity", w[i].numel ? (double)w[i].zeros / (double)w[i].numel : 0);
    if (w[i].nm_m) {
      char nm[16];
      snprintf(nm, sizeof nm, "%d:%d", w[i].nm_n, w[i].nm_m);
      cJSON_AddStringToObject(o, "pattern", nm);
    } else {
      cJSON_AddNullToObject(o, "pattern");
    }
    cJSON_AddBoolToObject(o, "quantized", w[i].quantized);
    if (f->masks[i].rule) cJSON_AddItemToObject(o, "mask", cli_mask_json(&f->masks[i]));
    else cJSON_AddNullToObject(o, "mask");
    cJSON_AddItemToArray(jw, o);
  }
  cJSON_AddStringToObject(root, "mask_mode", rc__mask_mode_name(f->mode));
  cJSON *jg = cJSON_AddArrayToObject(root, "grids");
  for (int i = 0; i < n_gr; i++) {
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "tensor", g->values[gr[i].value].name);
    cJSON_AddStringToObject(o, "node", g->nodes[gr[i].node].label);
    cJSON_AddStringToObject(o, "kind", gr[i].is_weight ? "weight" : "activation");
    cJSON_AddStringToObject(o, "dtype", rc_dtype_name(gr[i].dtype));
    if (gr[i].axis >= 0)
      cJSON_AddNumberToObject(o, "axis", gr[i].axis);
    else
      cJSON_AddNullToObject(o, "axis");
    cJSON *sc = cJSON_AddArrayToObject(o, "scale");
    cJSON *zp = cJSON_AddArrayToObject(o, "zero_point");
    for (int64_t k = 0; k < gr[i].n_scale; k++) {
      cJSON_AddItemToArray(sc, cJSON_CreateNumber(gr[i].scale ? gr[i].scale[k] : 0));
      cJSON_AddItemToArray(zp, cJSON_CreateNumber(zero_point_at(&gr[i], gr[i].zero_point &&
                                                                       rc_tensor_numel(gr[i].zero_point) > 1
                                                                   ? k
                                                                   : 0)));
    }
    cJSON_AddItemToObject(o, "range", cli_range_json(&f->ranges[i]));
    cJSON_AddItemToArray(jg, o);
  }
  char *text = cli_json_print(root);
  if (text) puts(text);
  free(text);
  cJSON_Delete(root);
}

static int name_width(const rc_graph *g, const int *vals, int n, int lo, int hi) {
  int w = lo;
  for (int i = 0; i < n; i++) {
    char nb[512];
    int len = cli_text_width(cli_esc(g->values[vals[i]].name, nb, sizeof nb));
    if (len > w) w = len;
  }
  return w < hi ? w : hi;
}

static void print_io(const char *title, const rc_graph *g, const int *vals, const io_shape *sh, int n, int width) {
  for (int i = 0; i < n; i++) {
    char buf[512], nb[512];
    printf("%-11s ", i ? "" : title);
    cli_print_cell(stdout, cli_esc(g->values[vals[i]].name, nb, sizeof nb), width);
    printf("  %s\n", io_text(&sh[i], buf, sizeof buf));
  }
}

static void print_tables(const rc_model *m, const io_shape *ins, const io_shape *outs, const op_count *ops,
                         int n_ops, const rc_weight_info *w, int n_w, const rc_grid_info *gr, int n_gr, int64_t macs,
                         const char *macs_why, const grid_facts *f) {
  const rc_graph *g = &m->graph;
  char b1[64], b2[64], nb[512];
  printf("model       %s (%s bytes)\n", cli_esc(m->path, nb, sizeof nb),
         cli_group_digits((long long)m->file_bytes, b1, sizeof b1));
  printf("format      ONNX IR version %lld, default-domain opset %d\n", (long long)g->ir_version, g->opset);
  int iow = name_width(g, g->inputs, g->n_inputs, 8, 60);
  int w2 = name_width(g, g->outputs, g->n_outputs, 8, 60);
  if (w2 > iow) iow = w2;
  print_io("inputs", g, g->inputs, ins, g->n_inputs, iow);
  print_io("outputs", g, g->outputs, outs, g->n_outputs, iow);
  printf("nodes       %d:", g->n_nodes);
  for (int i = 0; i < n_ops; i++) printf("%s %s %d", i ? "," : "", cli_esc(ops[i].op, nb, sizeof nb), ops[i].n);
  printf("\nparameters  %s\n", cli_group_digits(rc__graph_params(g), b1, sizeof b1));
  if (macs >= 0)
    printf("MACs        %s per sample\n", cli_group_digits(macs, b2, sizeof b2));
  else
    printf("MACs        unknown (%s)\n", cli_esc(macs_why, nb, sizeof nb));
  if (n_w) {
    printf("\n%-36s %-7s %-18s %13s %9s %7s  zeros under --mask %s\n", "weight", "role", "shape", "zeros/total",
           "sparsity", "N:M", rc__mask_mode_name(f->mode));
    for (int i = 0; i < n_w; i++) {
      const rc_value *v = &g->values[w[i].value];
      char shape[96], frac[48], nm[16] = "-";
      if (w[i].nm_m) snprintf(nm, sizeof nm, "%d:%d", w[i].nm_n, w[i].nm_m);
      snprintf(frac, sizeof frac, "%lld/%lld", (long long)w[i].zeros, (long long)w[i].numel);
      char mk[160] = "-";
      if (f->masks[i].rule) cli_mask_text(&f->masks[i], mk, sizeof mk);
      printf("%-36s %-7s %-18s %13s %8.1f%% %7s  %s%s\n", cli_esc(v->name, nb, sizeof nb), role_name(w[i].role),
             rc_shape_str(&v->decl, shape, sizeof shape), frac,
             w[i].numel ? 100.0 * (double)w[i].zeros / (double)w[i].numel : 0.0, nm, mk,
             w[i].quantized ? "  (quantized)" : "");
    }
  }
  if (n_gr) {
    printf("\n%-36s %-10s %-6s %-5s %-30s %s\n", "grid (integer tensor)", "kind", "dtype", "axis",
           "integer range (from; used)", "scale / zero point");
    for (int i = 0; i < n_gr; i++) {
      char axis[16] = "-", rg[96], used[48] = "";
      if (gr[i].axis >= 0) snprintf(axis, sizeof axis, "%d", gr[i].axis);
      if (f->ranges[i].has_used)
        snprintf(used, sizeof used, "; [%lld, %lld]", (long long)f->ranges[i].used_lo, (long long)f->ranges[i].used_hi);
      snprintf(rg, sizeof rg, "[%d, %d] (%s%s)", f->ranges[i].lo, f->ranges[i].hi,
               rc_range_source_name(f->ranges[i].source), used);
      printf("%-36s %-10s %-6s %-5s %-30s ", cli_esc(g->values[gr[i].value].name, nb, sizeof nb), gr[i].is_weight ? "weight" : "activation",
             rc_dtype_name(gr[i].dtype), axis, rg);
      if (gr[i].n_scale == 1)
        printf("%.9g / %g\n", gr[i].scale ? gr[i].scale[0] : 0.0, zero_point_at(&gr[i], 0));
      else
        printf("%lld per-axis scales, first %.9g / %g\n", (long long)gr[i].n_scale,
               gr[i].scale ? gr[i].scale[0] : 0.0, zero_point_at(&gr[i], 0));
    }
  }
}

static int inspect_pairs(const char *tpath, const char *spath, const char *const *pairs, int n_pairs, int json) {
  rc_err e = {0};
  rc_model *t = NULL, *s = NULL;
  rc_pairing pg = {0};
  rc_tensor *ins = NULL;
  int rc = RC_EXIT_FAIL;
  if (rc_model_load(&t, tpath, NULL, &e) != RC_OK || rc_model_load(&s, spath, NULL, &e) != RC_OK) goto out;
  if (!(ins = rc__batch1_inputs(&s->graph))) goto out;
  if (rc_pairing_init(&pg, &t->graph, &s->graph, ins, pairs, n_pairs, 1, &e) != RC_OK) goto out;
  if (json) {
    cJSON *arr = cJSON_CreateArray();
    for (int i = 0; i < pg.n; i++) {
      const rc_pair *p = &pg.pairs[i];
      cJSON *o = cJSON_CreateObject();
      cJSON_AddStringToObject(o, "teacher", t->graph.values[p->teacher].name);
      cJSON_AddStringToObject(o, "student", s->graph.values[p->student].name);
      cJSON_AddItemToObject(o, "teacher_shape", shape_json(&p->t_shape));
      cJSON_AddItemToObject(o, "student_shape", shape_json(&p->s_shape));
      cJSON_AddStringToObject(o, "matched_by", p->explicit_pair ? "given" : p->by_name ? "name" : "position");
      cJSON_AddBoolToObject(o, "projector", rc_pair_needs_projector(p));
      cJSON_AddItemToArray(arr, o);
    }
    char *text = cli_json_print(arr);
    if (text) puts(text);
    free(text);
    cJSON_Delete(arr);
  } else {
    /* Columns as wide as their longest entry, so long names keep the table aligned. */
    int wt = (int)strlen("teacher tensor"), ws = (int)strlen("student tensor"), wts = 5, wss = 5;
    for (int i = 0; i < pg.n; i++) {
      const rc_pair *p = &pg.pairs[i];
      char nb[512], a[96];
      int l = cli_text_width(cli_esc(t->graph.values[p->teacher].name, nb, sizeof nb));
      if (l > wt) wt = l;
      if ((l = cli_text_width(cli_esc(s->graph.values[p->student].name, nb, sizeof nb))) > ws) ws = l;
      if ((l = (int)strlen(rc_shape_str(&p->t_shape, a, sizeof a))) > wts) wts = l;
      if ((l = (int)strlen(rc_shape_str(&p->s_shape, a, sizeof a))) > wss) wss = l;
    }
    printf("%-*s  %-*s  %-*s  %-*s  %-8s  %s\n", wt, "teacher tensor", wts, "shape", ws, "student tensor", wss,
           "shape", "matched", "projector");
    for (int i = 0; i < pg.n; i++) {
      const rc_pair *p = &pg.pairs[i];
      char a[96], b[96], n1[512], n2[512];
      cli_print_cell(stdout, cli_esc(t->graph.values[p->teacher].name, n1, sizeof n1), wt);
      printf("  %-*s  ", wts, rc_shape_str(&p->t_shape, a, sizeof a));
      cli_print_cell(stdout, cli_esc(s->graph.values[p->student].name, n2, sizeof n2), ws);
      printf("  %-*s  %-8s  %s\n", wss, rc_shape_str(&p->s_shape, b, sizeof b),
             p->explicit_pair ? "given" : p->by_name ? "name" : "position", rc_pair_needs_projector(p) ? "yes" : "no");
    }
    if (!pg.n) printf("no pairs: give them with --pair TEACHER_TENSOR=STUDENT_TENSOR\n");
  }
  rc = RC_EXIT_OK;
out:
  if (rc != RC_EXIT_OK) cli_fail(&e);
  rc_pairing_free(&pg);
  rc__free(ins);
  rc_model_free(t);
  rc_model_free(s);
  return rc;
}

int rc_cmd_inspect(int argc, char **argv) {
  static const struct option longopts[] = {{"json", no_argument, NULL, 'j'},
                                           {"mask", required_argument, NULL, 'M'},
                                           {"pairs", no_argument, NULL, 'p'},
                                           {"pair", required_argument, NULL, 'P'},
                                           {"help", no_argument, NULL, 'h'},
                                           {NULL, 0, NULL, 0}};
  int json = 0, want_pairs = 0, n_pairs = 0, c;
  grid_facts facts = {RC_MASK_AUTO, NULL, NULL};
  const char *pairs[64];
  optind = 1;
  while ((c = getopt_long(argc, argv, "h", longopts, NULL)) != -1) {
    if (c == 'j') json = 1;
    else if (c == 'M') {
      if (!rc__mask_mode_parse(optarg, &facts.mode))
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
  rc_err e = {0};
  rc_model *m = NULL;
  if (rc_model_load(&m, argv[optind], NULL, &e) != RC_OK) return cli_fail(&e);
  const rc_graph *g = &m->graph;
  op_count *ops = rc__calloc((size_t)g->n_nodes + 1, sizeof(op_count));
  rc_weight_info *w = NULL;
  rc_grid_info *gr = NULL;
  int n_w = 0, n_gr = 0, rc = RC_EXIT_OK;
  if (!ops || rc__weights_collect(g, &w, &n_w, &e) != RC_OK || rc__grids_collect(g, &gr, &n_gr, &e) != RC_OK ||
      decide(m, w, n_w, gr, n_gr, &facts, &e) != RC_OK) {
    rc = cli_fail(&e);
    goto out;
  }
  int n_ops = count_ops(g, ops);
  rc_err pe = {0}, se = {0};
  int64_t macs = rc__graph_macs_batch1(g, &pe);
  io_shape *ins = rc__calloc((size_t)g->n_inputs + 1, sizeof *ins), *outs = rc__calloc((size_t)g->n_outputs + 1, sizeof *outs);
  if (!ins || !outs) {
    rc__free(ins);
    rc__free(outs);
    rc = cli_fail(&(rc_err){RC_ERR_NOMEM, "out of memory"});
    goto out;
  }
  io_shapes(m, 0, ins, g->n_inputs, &se);
  io_shapes(m, 1, outs, g->n_outputs, &se);
  if (json)
    print_json(m, ins, outs, ops, n_ops, w, n_w, gr, n_gr, macs, &facts);
  else
    print_tables(m, ins, outs, ops, n_ops, w, n_w, gr, n_gr, macs, pe.msg, &facts);
  rc__free(ins);
  rc__free(outs);
out:
  rc__free(facts.masks);
  rc__free(facts.ranges);
  rc__free(ops);
  rc__free(w);
  rc__free(gr);
  rc_model_free(m);
  return rc;
}
