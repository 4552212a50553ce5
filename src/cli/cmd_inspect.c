/* recoup inspect MODEL.onnx [--json]: what a model is made of. */
#include <cJSON.h>
#include <getopt.h>
#include <stdlib.h>
#include <string.h>

#include "cli/cli.h"
#include "core/alloc.h"
#include "plan/count.h"
#include "plan/inspect.h"
#include "plan/load.h"
#include "plan/plan.h"
#include "train/pairing.h"

static void usage(FILE *f) {
  fprintf(f,
          "Usage: recoup inspect MODEL.onnx [--json]\n"
          "       recoup inspect --pairs DENSE.onnx STUDENT.onnx [--pair T=S ...] [--json]\n"
          "\n"
          "Show a model's inputs and outputs (shapes, dtypes), IR version and opset,\n"
          "op counts, parameter count, per-tensor weight sparsity with any N:M pattern,\n"
          "quantization grids (dtype, scale, zero point, axis) and multiply-accumulates\n"
          "for a batch of one.\n"
          "\n"
          "With --pairs: the teacher and student tensors feature losses would match\n"
          "(automatic pairing, or the --pair overrides), with their shapes at batch 1\n"
          "and whether a projector bridges different widths.\n"
          "\n"
          "Options:\n"
          "  --json      print one JSON object on stdout instead of tables\n"
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

static const char *dim_str(const rc_tensor *t, char *buf, size_t n) {
  if (t->rank < 0) return "(unknown)";
  size_t used = (size_t)snprintf(buf, n, "(");
  for (int i = 0; i < t->rank && used < n; i++) {
    if (t->dims[i] >= 0)
      used += (size_t)snprintf(buf + used, n - used, "%s%lld", i ? ", " : "", (long long)t->dims[i]);
    else
      used += (size_t)snprintf(buf + used, n - used, "%s?", i ? ", " : "");
  }
  if (used < n) snprintf(buf + used, n - used, ")");
  return buf;
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

static cJSON *io_json(const rc_graph *g, const int *vals, int n) {
  cJSON *arr = cJSON_CreateArray();
  for (int i = 0; i < n; i++) {
    const rc_value *v = &g->values[vals[i]];
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "name", v->name);
    cJSON_AddStringToObject(o, "dtype", rc_dtype_name(v->decl.dtype));
    cJSON_AddItemToObject(o, "shape", v->decl.rank >= 0 ? shape_json(&v->decl) : cJSON_CreateNull());
    cJSON_AddItemToArray(arr, o);
  }
  return arr;
}

static double zero_point_at(const rc_grid_info *gi, int64_t i) {
  return gi->zero_point && gi->zero_point->data ? (double)rc__int_at(gi->zero_point, i) : 0.0;
}

static void print_json(const rc_model *m, const op_count *ops, int n_ops, const rc_weight_info *w,
                       int n_w, const rc_grid_info *gr, int n_gr, int64_t macs) {
  const rc_graph *g = &m->graph;
  cJSON *root = cJSON_CreateObject();
  cJSON_AddStringToObject(root, "model", m->path);
  cJSON_AddNumberToObject(root, "file_bytes", (double)m->file_bytes);
  cJSON_AddNumberToObject(root, "ir_version", (double)g->ir_version);
  cJSON_AddNumberToObject(root, "opset", g->opset);
  cJSON_AddItemToObject(root, "inputs", io_json(g, g->inputs, g->n_inputs));
  cJSON_AddItemToObject(root, "outputs", io_json(g, g->outputs, g->n_outputs));
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
    cJSON_AddItemToArray(jw, o);
  }
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
    cJSON_AddItemToArray(jg, o);
  }
  char *text = cJSON_Print(root);
  if (text) puts(text);
  free(text);
  cJSON_Delete(root);
}

static void print_io(const char *title, const rc_graph *g, const int *vals, int n) {
  for (int i = 0; i < n; i++) {
    const rc_value *v = &g->values[vals[i]];
    char buf[160];
    printf("%-11s %-20s %-8s %s\n", i ? "" : title, v->name, rc_dtype_name(v->decl.dtype),
           dim_str(&v->decl, buf, sizeof buf));
  }
}

/* Outputs; where the file declares no type or shape, the one recoup's shape
 * inference computes at batch 1, with the batch axis shown as N. */
static void print_outputs(const rc_graph *g) {
  rc_plan *p = NULL;
  rc_err e = {0};
  for (int i = 0; i < g->n_outputs; i++) {
    const rc_value *v = &g->values[g->outputs[i]];
    if ((v->decl.rank >= 0 && v->decl.dtype != RC_DTYPE_UNDEFINED) ||
        (!p && rc__plan_batch1(&p, g, &e) != RC_OK)) {
      print_io(i ? "" : "outputs", g, g->outputs + i, 1);
      continue;
    }
    rc_tensor t = *rc_plan_tensor(p, g->outputs[i]);
    char buf[160];
    t.dims[0] = -1;
    dim_str(&t, buf, sizeof buf);
    if (buf[1] == '?') buf[1] = 'N';
    printf("%-11s %-20s %-8s %s  (not in the file: computed by recoup)\n", i ? "" : "outputs", v->name,
           rc_dtype_name(t.dtype), buf);
  }
  rc_plan_free(p);
}

static void print_tables(const rc_model *m, const op_count *ops, int n_ops, const rc_weight_info *w,
                         int n_w, const rc_grid_info *gr, int n_gr, int64_t macs, const char *macs_why) {
  const rc_graph *g = &m->graph;
  char b1[64], b2[64];
  printf("model       %s (%s bytes)\n", m->path, cli_group_digits((long long)m->file_bytes, b1, sizeof b1));
  printf("format      ONNX IR version %lld, default-domain opset %d\n", (long long)g->ir_version, g->opset);
  print_io("inputs", g, g->inputs, g->n_inputs);
  print_outputs(g);
  printf("nodes       %d:", g->n_nodes);
  for (int i = 0; i < n_ops; i++) printf("%s %s %d", i ? "," : "", ops[i].op, ops[i].n);
  printf("\nparameters  %s\n", cli_group_digits(rc__graph_params(g), b1, sizeof b1));
  if (macs >= 0)
    printf("MACs        %s per sample\n", cli_group_digits(macs, b2, sizeof b2));
  else
    printf("MACs        unknown (%s)\n", macs_why);
  if (n_w) {
    printf("\n%-36s %-7s %-18s %13s %9s %7s\n", "weight", "role", "shape", "zeros/total", "sparsity",
           "N:M");
    for (int i = 0; i < n_w; i++) {
      const rc_value *v = &g->values[w[i].value];
      char shape[96], frac[48], nm[16] = "-";
      if (w[i].nm_m) snprintf(nm, sizeof nm, "%d:%d", w[i].nm_n, w[i].nm_m);
      snprintf(frac, sizeof frac, "%lld/%lld", (long long)w[i].zeros, (long long)w[i].numel);
      printf("%-36s %-7s %-18s %13s %8.1f%% %7s%s\n", v->name, role_name(w[i].role),
             rc_shape_str(&v->decl, shape, sizeof shape), frac,
             w[i].numel ? 100.0 * (double)w[i].zeros / (double)w[i].numel : 0.0, nm,
             w[i].quantized ? "  (quantized)" : "");
    }
  }
  if (n_gr) {
    printf("\n%-36s %-10s %-6s %-5s %s\n", "grid (integer tensor)", "kind", "dtype", "axis", "scale / zero point");
    for (int i = 0; i < n_gr; i++) {
      char axis[16] = "-";
      if (gr[i].axis >= 0) snprintf(axis, sizeof axis, "%d", gr[i].axis);
      printf("%-36s %-10s %-6s %-5s ", g->values[gr[i].value].name, gr[i].is_weight ? "weight" : "activation",
             rc_dtype_name(gr[i].dtype), axis);
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
  if (rc_pairing_make(&pg, &t->graph, &s->graph, ins, pairs, n_pairs, 1, &e) != RC_OK) goto out;
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
    char *text = cJSON_Print(arr);
    if (text) puts(text);
    free(text);
    cJSON_Delete(arr);
  } else {
    printf("%-32s %-18s %-32s %-18s %-9s %s\n", "teacher tensor", "shape", "student tensor", "shape", "matched",
           "projector");
    for (int i = 0; i < pg.n; i++) {
      const rc_pair *p = &pg.pairs[i];
      char a[96], b[96];
      printf("%-32s %-18s %-32s %-18s %-9s %s\n", t->graph.values[p->teacher].name, rc_shape_str(&p->t_shape, a, sizeof a),
             s->graph.values[p->student].name, rc_shape_str(&p->s_shape, b, sizeof b),
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
                                           {"pairs", no_argument, NULL, 'p'},
                                           {"pair", required_argument, NULL, 'P'},
                                           {"help", no_argument, NULL, 'h'},
                                           {NULL, 0, NULL, 0}};
  int json = 0, want_pairs = 0, n_pairs = 0, c;
  const char *pairs[64];
  optind = 1;
  while ((c = getopt_long(argc, argv, "h", longopts, NULL)) != -1) {
    if (c == 'j') json = 1;
    else if (c == 'p') want_pairs = 1;
    else if (c == 'P') {
      if (n_pairs == 64) return cli_usage_error("inspect", "too many --pair");
      pairs[n_pairs++] = optarg;
    } else if (c == 'h') {
      usage(stdout);
      return RC_EXIT_OK;
    } else
      return cli_usage_error("inspect", "unknown option");
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
  if (!ops || rc__weights_collect(g, &w, &n_w, &e) != RC_OK || rc__grids_collect(g, &gr, &n_gr, &e) != RC_OK) {
    rc = cli_fail(&e);
    goto out;
  }
  int n_ops = count_ops(g, ops);
  rc_err pe = {0};
  int64_t macs = rc__graph_macs_batch1(g, &pe);
  if (json)
    print_json(m, ops, n_ops, w, n_w, gr, n_gr, macs);
  else
    print_tables(m, ops, n_ops, w, n_w, gr, n_gr, macs, pe.msg);
out:
  rc__free(ops);
  rc__free(w);
  rc__free(gr);
  rc_model_free(m);
  return rc;
}
