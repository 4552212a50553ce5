#include "train/pairing.h"

#include <stdio.h>
#include <string.h>

#include "core/alloc.h"
#include "plan/plan.h"

static int is_layer(const rc_node *n) {
  return !strcmp(n->op_type, "Conv") || !strcmp(n->op_type, "ConvTranspose") || !strcmp(n->op_type, "Gemm") ||
         !strcmp(n->op_type, "MatMul");
}

static int is_residual_add(rc_plan *p, const rc_graph *g, const rc_node *n) {
  if (strcmp(n->op_type, "Add") || n->n_in != 2 || n->in[0] < 0 || n->in[1] < 0) return 0;
  for (int i = 0; i < 2; i++)
    if (g->values[n->in[i]].kind != RC_VALUE_ACTIVATION || rc_plan_is_const(p, n->in[i])) return 0;
  return rc_shape_equal(rc_plan_tensor(p, n->in[0]), rc_plan_tensor(p, n->in[1]));
}

/* Candidate values of a graph in topological order; *cands from rc__malloc. */
static rc_status candidates(rc_plan *p, const rc_graph *g, int **cands, int *n, rc_err *e) {
  *n = 0;
  *cands = rc__malloc(sizeof(int) * (size_t)(g->n_nodes + 1));
  if (!*cands) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  for (int i = 0; i < g->n_nodes; i++) {
    const rc_node *nd = &g->nodes[i];
    if (nd->n_out < 1 || nd->out[0] < 0 || rc_plan_is_const(p, nd->out[0])) continue;
    if (rc_plan_tensor(p, nd->out[0])->dtype != RC_DTYPE_FLOAT) continue;
    if (is_layer(nd) || is_residual_add(p, g, nd)) (*cands)[(*n)++] = nd->out[0];
  }
  return RC_OK;
}

/* Same rank and the same dims after the channel axis (axis 1 for rank >= 3,
 * nothing for (N, C)); a rank-3 (N, L, C) tensor compares L. */
static int spatial_match(const rc_tensor *a, const rc_tensor *b) {
  if (a->rank != b->rank || a->rank < 2) return 0;
  if (a->rank == 3) return a->dims[1] == b->dims[1];
  for (int d = 2; d < a->rank; d++)
    if (a->dims[d] != b->dims[d]) return 0;
  return 1;
}

static int channel_axis(const rc_tensor *t) { return t->rank == 3 ? 2 : 1; }

int rc_pair_needs_projector(const rc_pair *p) {
  int a = channel_axis(&p->t_shape);
  return p->t_shape.dims[a] != p->s_shape.dims[a];
}

static rc_status push(rc_pairing *out, rc_plan *tp, rc_plan *sp, int t, int s, int by_name, int expl, rc_err *e) {
  for (int i = 0; i < out->n; i++)
    if (out->pairs[i].student == s && out->pairs[i].teacher == t) return RC_OK;
  rc_pair *grown = rc__realloc(out->pairs, sizeof *grown * (size_t)(out->n + 1));
  if (!grown) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  out->pairs = grown;
  rc_pair *p = &out->pairs[out->n++];
  memset(p, 0, sizeof *p);
  p->teacher = t;
  p->student = s;
  p->t_shape = *rc_plan_tensor(tp, t);
  p->s_shape = *rc_plan_tensor(sp, s);
  p->t_shape.data = p->s_shape.data = NULL;
  p->by_name = by_name;
  p->explicit_pair = expl;
  p->weight = 1.0f;
  return RC_OK;
}

static rc_status add_explicit(rc_pairing *out, rc_plan *tp, rc_plan *sp, const rc_graph *tg, const rc_graph *sg,
                              const char *spec, rc_err *e) {
  const char *eq = strchr(spec, '=');
  if (!eq || eq == spec || !eq[1])
    return rc__fail(e, RC_ERR_INVALID, "pair '%s': expected TEACHER_TENSOR=STUDENT_TENSOR", spec);
  char tname[1024];
  snprintf(tname, sizeof tname, "%.*s", (int)(eq - spec), spec);
  int t = rc__graph_find_value(tg, tname), s = rc__graph_find_value(sg, eq + 1);
  if (t < 0) return rc__fail(e, RC_ERR_INVALID, "pair: teacher %s has no tensor '%s'", tg->path, tname);
  if (s < 0) return rc__fail(e, RC_ERR_INVALID, "pair: student %s has no tensor '%s'", sg->path, eq + 1);
  const rc_tensor *a = rc_plan_tensor(tp, t), *b = rc_plan_tensor(sp, s);
  if (a->dtype != RC_DTYPE_FLOAT || b->dtype != RC_DTYPE_FLOAT || !spatial_match(a, b)) {
    char sa[128], sb[128];
    return rc__fail(e, RC_ERR_SHAPE, "pair %s: teacher shape %s and student shape %s are not compatible "
                    "(same rank and spatial size needed)", spec, rc_shape_str(a, sa, sizeof sa),
                    rc_shape_str(b, sb, sizeof sb));
  }
  return push(out, tp, sp, t, s, 0, 1, e);
}

static rc_status automatic(rc_pairing *out, rc_plan *tp, rc_plan *sp, const rc_graph *tg, const rc_graph *sg,
                           rc_err *e) {
  int *tc = NULL, *sc = NULL, nt = 0, ns = 0;
  rc_status st = candidates(tp, tg, &tc, &nt, e);
  if (st == RC_OK) st = candidates(sp, sg, &sc, &ns, e);
  unsigned char *used = st == RC_OK ? rc__calloc((size_t)nt + 1, 1) : NULL;
  if (st == RC_OK && !used) st = rc__fail(e, RC_ERR_NOMEM, "out of memory");
  /* By name first. */
  for (int j = 0; j < ns && st == RC_OK; j++)
    for (int i = 0; i < nt; i++)
      if (!used[i] && !strcmp(tg->values[tc[i]].name, sg->values[sc[j]].name) &&
          spatial_match(rc_plan_tensor(tp, tc[i]), rc_plan_tensor(sp, sc[j]))) {
        used[i] = 1;
        sc[j] = -sc[j] - 1; /* marks the student candidate as paired */
        st = push(out, tp, sp, tc[i], -sc[j] - 1, 1, 0, e);
        break;
      }
  /* Then by position among the rest, where spatial sizes agree. */
  for (int j = 0, i = 0; j < ns && st == RC_OK; j++) {
    if (sc[j] < 0) continue;
    while (i < nt && used[i]) i++;
    if (i >= nt) break;
    if (spatial_match(rc_plan_tensor(tp, tc[i]), rc_plan_tensor(sp, sc[j]))) {
      used[i] = 1;
      st = push(out, tp, sp, tc[i], sc[j], 0, 0, e);
    }
    i++;
  }
  rc__free(tc);
  rc__free(sc);
  rc__free(used);
  return st;
}

rc_status rc__pairing_plans(rc_plan **tp, rc_plan **sp, const rc_graph *tg, const rc_graph *sg,
                            const rc_tensor *input_shapes, rc_err *e) {
  *tp = *sp = NULL;
  rc_tensor tin[16];
  if (sg->n_inputs > 16 || tg->n_inputs > 16) return rc__fail(e, RC_ERR_UNSUPPORTED, "more than 16 inputs");
  for (int i = 0; i < tg->n_inputs; i++) {
    tin[i] = input_shapes[0];
    for (int j = 0; j < sg->n_inputs; j++)
      if (!strcmp(sg->values[sg->inputs[j]].name, tg->values[tg->inputs[i]].name)) tin[i] = input_shapes[j];
  }
  rc_status st = rc_plan_init(tp, tg, tin, NULL, e);
  if (st == RC_OK) st = rc_plan_init(sp, sg, input_shapes, NULL, e);
  if (st != RC_OK) {
    rc_plan_free(*tp);
    *tp = NULL;
  }
  return st;
}

rc_status rc_pairing_init(rc_pairing *out, const rc_graph *tg, const rc_graph *sg, const rc_tensor *input_shapes,
                          const char *const *explicit_pairs, int n_explicit, int automatic_pairs, rc_err *e) {
  memset(out, 0, sizeof *out);
  rc_plan *tp, *sp;
  rc_status st = rc__pairing_plans(&tp, &sp, tg, sg, input_shapes, e);
  for (int i = 0; i < n_explicit && st == RC_OK; i++) st = add_explicit(out, tp, sp, tg, sg, explicit_pairs[i], e);
  if (st == RC_OK && automatic_pairs && n_explicit == 0) st = automatic(out, tp, sp, tg, sg, e);
  rc_plan_free(tp);
  rc_plan_free(sp);
  if (st != RC_OK) rc_pairing_free(out);
  return st;
}

void rc_pairing_free(rc_pairing *p) {
  rc__free(p->pairs);
  memset(p, 0, sizeof *p);
}
