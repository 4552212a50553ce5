/* Removing whole output channels (see prune.h).
 *
 * Channel removal works on "slots": every output channel of a prunable layer
 * is a slot, and channels that must be removed together (the two branches of
 * a residual Add, the channels a depthwise convolution carries through, a
 * shared initializer) are joined with union-find while the graph is walked
 * in order. Each activation that carries channels along axis 1 knows the
 * slot of every channel (after Flatten, each channel spans `s` consecutive
 * features). Every tensor that must shrink with those channels is recorded
 * as an edit (initializer, axis, slots); a structure we cannot rewrite
 * "fixes" the slots it touches, which are then kept, with the reason
 * reported. Only after the walk is it decided which slot classes go, so the
 * rewrite is all-or-nothing per class and the model stays consistent. */
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "compress/prune_internal.h"
#include "core/alloc.h"
#include "core/arena.h"
#include "onnx/reshape.h"
#include "plan/count.h"
#include "plan/plan.h"

static rc_status add_note(rc_prune_report *r, rc_err *e, const char *fmt, ...) {
  char (*grown)[240] = rc__realloc(r->notes, sizeof *r->notes * (size_t)(r->n_notes + 1));
  if (!grown) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  r->notes = grown;
  va_list ap;
  va_start(ap, fmt);
  vsnprintf(r->notes[r->n_notes++], sizeof *r->notes, fmt, ap);
  va_end(ap);
  return RC_OK;
}

/* ------------------------------------------------------------ channel slots */

typedef struct vchan {
  int *slot;   /* slot of each channel, NULL when the value carries no tracked channels */
  int c;       /* channels */
  int64_t s;   /* features per channel along axis 1 (1, or H*W after Flatten) */
} vchan;

typedef struct edit {
  int value, axis; /* initializer and axis; axis -1 for a Reshape target entry (index in `s`) */
  int64_t n, s;    /* length along axis = (slots) * s */
  int *slot;
  int node;        /* Conv whose group follows the kept count, or -1 */
} edit;

typedef struct cp {
  rc_model *m;
  rc_graph *g;
  rc_plan *p;
  rc_prune_report *r;
  rc_err *e;
  rc_arena arena;
  vchan *vc;
  int *uses;          /* consumers per value (graph outputs count) */
  int n_slots, cap;
  int *parent, *src, *why;   /* union-find; real source or -1; reason index or -1 */
  float *score;
  unsigned char *fixed;
  int n_src;
  int *src_node;      /* node of each source */
  edit *edits;
  int n_edits, cap_edits;
  char (*reasons)[200];
  int n_reasons;
  int last_node;      /* the last prunable layer: its outputs stay */
  rc_status st;
} cp;

static int find(cp *c, int a) {
  while (c->parent[a] != a) a = c->parent[a] = c->parent[c->parent[a]];
  return a;
}

static void unite(cp *c, int a, int b) {
  a = find(c, a);
  b = find(c, b);
  if (a == b) return;
  if (b < a) {
    int t = a;
    a = b;
    b = t;
  }
  c->parent[b] = a;
  c->fixed[a] |= c->fixed[b];
  if (c->why[a] < 0) c->why[a] = c->why[b];
}

static int reason(cp *c, const char *fmt, ...) {
  char (*grown)[200] = rc__realloc(c->reasons, sizeof *c->reasons * (size_t)(c->n_reasons + 1));
  if (!grown) {
    c->st = rc__fail(c->e, RC_ERR_NOMEM, "out of memory");
    return -1;
  }
  c->reasons = grown;
  va_list ap;
  va_start(ap, fmt);
  vsnprintf(c->reasons[c->n_reasons], sizeof *c->reasons, fmt, ap);
  va_end(ap);
  return c->n_reasons++;
}

static int *new_slots(cp *c, int n, int source) {
  if (c->n_slots + n > c->cap) {
    int cap = c->cap ? c->cap : 256;
    while (cap < c->n_slots + n) cap *= 2;
    int *pa = rc__realloc(c->parent, sizeof(int) * (size_t)cap);
    if (pa) c->parent = pa;
    int *sr = rc__realloc(c->src, sizeof(int) * (size_t)cap);
    if (sr) c->src = sr;
    int *wh = rc__realloc(c->why, sizeof(int) * (size_t)cap);
    if (wh) c->why = wh;
    float *sc = rc__realloc(c->score, sizeof(float) * (size_t)cap);
    if (sc) c->score = sc;
    unsigned char *fx = rc__realloc(c->fixed, (size_t)cap);
    if (fx) c->fixed = fx;
    if (!pa || !sr || !wh || !sc || !fx) {
      c->st = rc__fail(c->e, RC_ERR_NOMEM, "out of memory");
      return NULL;
    }
    c->cap = cap;
  }
  int *ids = rc__arena_alloc(&c->arena, sizeof(int) * (size_t)(n + 1));
  if (!ids) {
    c->st = rc__fail(c->e, RC_ERR_NOMEM, "out of memory");
    return NULL;
  }
  for (int i = 0; i < n; i++) {
    int k = c->n_slots++;
    c->parent[k] = k;
    c->src[k] = source;
    c->why[k] = -1;
    c->score[k] = 0;
    c->fixed[k] = 0;
    ids[i] = k;
  }
  return ids;
}

static void fix_slots(cp *c, const int *slot, int n, int why) {
  for (int i = 0; i < n; i++) {
    int r = find(c, slot[i]);
    c->fixed[r] = 1;
    if (c->why[r] < 0) c->why[r] = why;
  }
}

static void fix_value(cp *c, int v, int why) {
  if (v >= 0 && c->vc[v].slot) fix_slots(c, c->vc[v].slot, c->vc[v].c, why);
}

/* Keep the channels of every input of node n (an op we cannot narrow). */
static void fix_inputs(cp *c, const rc_node *n, const char *why_fmt) {
  int any = 0;
  for (int i = 0; i < n->n_in; i++) any |= n->in[i] >= 0 && c->vc[n->in[i]].slot != NULL;
  if (!any) return;
  int why = reason(c, why_fmt, n->label, n->op_type);
  for (int i = 0; i < n->n_in; i++) fix_value(c, n->in[i], why);
}

static const rc_tensor *shape_of(cp *c, int v) { return rc_plan_tensor(c->p, v); }

static void track(cp *c, int v, int *slot, int ch, int64_t s) {
  c->vc[v].slot = slot;
  c->vc[v].c = ch;
  c->vc[v].s = s;
}

/* Record that initializer `value` shrinks along `axis` with these slots. A
 * tensor edited twice along one axis (shared by two layers) joins the slots. */
static void add_edit(cp *c, int value, int axis, int64_t n, int64_t s, int *slot, int node) {
  for (int i = 0; i < c->n_edits; i++) {
    edit *d = &c->edits[i];
    if (d->value != value || d->axis != axis) continue;
    if (d->n == n && d->s == s && d->node < 0 && node < 0) {
      for (int64_t k = 0; k < n / s; k++) unite(c, d->slot[k], slot[k]);
    } else {
      int why = reason(c, "initializer '%s' is shared by layers that disagree on its channels",
                       c->g->values[value].name);
      fix_slots(c, d->slot, (int)(d->n / d->s), why);
      fix_slots(c, slot, (int)(n / s), why);
    }
    return;
  }
  if (c->n_edits == c->cap_edits) {
    int cap = c->cap_edits ? c->cap_edits * 2 : 64;
    edit *grown = rc__realloc(c->edits, sizeof *grown * (size_t)cap);
    if (!grown) {
      c->st = rc__fail(c->e, RC_ERR_NOMEM, "out of memory");
      return;
    }
    c->edits = grown;
    c->cap_edits = cap;
  }
  c->edits[c->n_edits++] = (edit){value, axis, n, s, slot, node};
}

/* L1 norm of each slice of t along axis, scaled so their mean is 1 (scores
 * of different layers are then comparable when their channels are joined). */
static void l1_scores(cp *c, const rc_tensor *t, int axis, const int *slot) {
  int64_t len = t->dims[axis], inner = 1, outer = 1;
  for (int d = axis + 1; d < t->rank; d++) inner *= t->dims[d];
  for (int d = 0; d < axis; d++) outer *= t->dims[d];
  const float *w = t->data;
  double total = 0;
  for (int64_t k = 0; k < len; k++) {
    double sum = 0;
    for (int64_t o = 0; o < outer; o++)
      for (int64_t i = 0; i < inner; i++) sum += fabs(w[(o * len + k) * inner + i]);
    c->score[slot[k]] = (float)sum;
    total += sum;
  }
  double mean = len ? total / (double)len : 0;
  if (mean > 0)
    for (int64_t k = 0; k < len; k++) c->score[slot[k]] = (float)(c->score[slot[k]] / mean);
}

/* A new source: the output channels of a prunable layer. */
static int *new_source(cp *c, int node, int ch) {
  int id = c->n_src++;
  int *grown = rc__realloc(c->src_node, sizeof(int) * (size_t)c->n_src);
  if (!grown) {
    c->st = rc__fail(c->e, RC_ERR_NOMEM, "out of memory");
    return NULL;
  }
  c->src_node = grown;
  c->src_node[id] = node;
  int *slot = new_slots(c, ch, id);
  if (slot && node == c->last_node)
    fix_slots(c, slot, ch, reason(c, "layer '%s' is the last layer: its outputs are the model's",
                                  c->g->nodes[node].label));
  return slot;
}

static int value_used(const cp *c, int v) { return v >= 0 && c->uses[v] > 0; }

static int any_extra_output_used(const cp *c, const rc_node *n) {
  for (int k = 1; k < n->n_out; k++)
    if (value_used(c, n->out[k])) return 1;
  return 0;
}

/* Bias of a layer: (M), or (1, M) for Gemm. */
static void bias_edit(cp *c, int b, int64_t ch, int *slot) {
  if (b < 0) return;
  const rc_tensor *t = shape_of(c, b);
  if (!is_float_init(c->g, b) || t->rank < 1 || t->dims[t->rank - 1] != ch) {
    if (is_float_init(c->g, b) && rc_tensor_numel(t) == 1) return; /* one value broadcast to all */
    int why = reason(c, "bias '%s' cannot be narrowed", c->g->values[b].name);
    fix_slots(c, slot, (int)ch, why);
    fix_value(c, b, why);
    return;
  }
  add_edit(c, b, t->rank - 1, ch, 1, slot, -1);
}

static void conv_node(cp *c, int ni) {
  const rc_node *n = &c->g->nodes[ni];
  int transposed = is_op(n, "ConvTranspose");
  int x = n->in[0], w = n->n_in > 1 ? n->in[1] : -1, b = n->n_in > 2 ? n->in[2] : -1, y = n->out[0];
  if (!is_float_init(c->g, w) || any_extra_output_used(c, n)) {
    fix_inputs(c, n, "layer '%s' (%s) has no float weight initializer");
    return;
  }
  const rc_tensor *wt = &c->g->values[w].decl, *xt = shape_of(c, x), *yt = shape_of(c, y);
  int64_t group = rc__attr_int(n, "group", 1), cin = xt->dims[1], cout = yt->dims[1];
  vchan xv = c->vc[x];
  if (xv.slot && xv.s != 1) {
    fix_inputs(c, n, "layer '%s' (%s) reads a flattened tensor");
    xv.slot = NULL;
  }
  int depthwise = !transposed && group > 1 && group == cin && wt->dims[0] == cin && wt->dims[1] == 1;
  if (depthwise) {
    /* Channel k in, channel k out: the layer follows its input's channels. */
    if (!xv.slot) return;
    add_edit(c, w, 0, cin, 1, xv.slot, ni);
    bias_edit(c, b, cin, xv.slot);
    track(c, y, xv.slot, (int)cin, 1);
    return;
  }
  if (group != 1) {
    int why = reason(c, "layer '%s' (%s) is a grouped convolution (group %lld)", n->label, n->op_type,
                     (long long)group);
    fix_value(c, x, why);
    int *slot = new_source(c, ni, (int)cout);
    if (!slot) return;
    fix_slots(c, slot, (int)cout, why);
    track(c, y, slot, (int)cout, 1);
    return;
  }
  if (xv.slot) add_edit(c, w, transposed ? 0 : 1, cin, 1, xv.slot, -1);
  int *slot = new_source(c, ni, (int)cout);
  if (!slot) return;
  l1_scores(c, wt, transposed ? 1 : 0, slot);
  add_edit(c, w, transposed ? 1 : 0, cout, 1, slot, -1);
  bias_edit(c, b, cout, slot);
  track(c, y, slot, (int)cout, 1);
}

/* Gemm (transA 0) and MatMul with a rank-2 weight initializer on (N, K). */
static void dense_node(cp *c, int ni) {
  const rc_node *n = &c->g->nodes[ni];
  int gemm = is_op(n, "Gemm");
  int a = n->in[0], w = n->n_in > 1 ? n->in[1] : -1, y = n->out[0];
  const rc_tensor *at = shape_of(c, a);
  int trans_b = gemm && rc__attr_int(n, "transB", 0);
  if (!is_float_init(c->g, w) || c->g->values[w].decl.rank != 2 || at->rank != 2 ||
      (gemm && rc__attr_int(n, "transA", 0))) {
    fix_inputs(c, n, "layer '%s' (%s) is not (N, K) times a weight initializer");
    return;
  }
  const rc_tensor *wt = &c->g->values[w].decl;
  int in_axis = trans_b ? 1 : 0, out_axis = 1 - in_axis;
  vchan *av = &c->vc[a];
  if (av->slot && (int64_t)av->c * av->s != at->dims[1]) fix_inputs(c, n, "layer '%s' (%s) reads features recoup cannot map to channels");
  else if (av->slot) add_edit(c, w, in_axis, at->dims[1], av->s, av->slot, -1);
  int64_t cout = wt->dims[out_axis];
  int *slot = new_source(c, ni, (int)cout);
  if (!slot) return;
  l1_scores(c, wt, out_axis, slot);
  add_edit(c, w, out_axis, cout, 1, slot, -1);
  if (gemm && n->n_in > 2) bias_edit(c, n->in[2], cout, slot);
  track(c, y, slot, (int)cout, 1);
}

/* Ops that act on each channel alone (with numpy broadcasting): their
 * tracked inputs share channels with the output, and constants that hold one
 * entry per channel shrink with them. */
static void channelwise_node(cp *c, int ni) {
  const rc_node *n = &c->g->nodes[ni];
  int y = n->out[0];
  const rc_tensor *yt = shape_of(c, y);
  if (yt->rank < 2 || any_extra_output_used(c, n)) {
    fix_inputs(c, n, "node '%s' (%s) has outputs recoup cannot narrow");
    return;
  }
  int64_t ch = yt->dims[1];
  int *res = NULL, ok = 1;
  int64_t s = 1;
  for (int i = 0; i < n->n_in && ok; i++) {
    int v = n->in[i];
    if (v < 0) continue;
    const rc_tensor *t = shape_of(c, v);
    int al = 1 - (yt->rank - t->rank);
    if (al < 0 || t->dims[al] == 1) continue;
    if (t->dims[al] != ch) ok = 0;
    else if (c->g->values[v].kind == RC_VALUE_INITIALIZER) continue;
    else if (!c->vc[v].slot || al != 1) ok = 0;
    else if (!res) {
      res = c->vc[v].slot;
      s = c->vc[v].s;
    } else if (c->vc[v].s != s) ok = 0;
    else
      for (int k = 0; k < c->vc[v].c; k++) unite(c, res[k], c->vc[v].slot[k]);
  }
  if (!ok || !res) {
    fix_inputs(c, n, "node '%s' (%s) mixes channels with a tensor recoup does not track");
    return;
  }
  for (int i = 0; i < n->n_in; i++) {
    int v = n->in[i];
    if (v < 0 || c->g->values[v].kind != RC_VALUE_INITIALIZER) continue;
    const rc_tensor *t = shape_of(c, v);
    int al = 1 - (yt->rank - t->rank);
    if (al < 0 || t->dims[al] == 1) continue;
    if (t->dtype != RC_DTYPE_FLOAT || !t->data) {
      fix_slots(c, res, (int)(ch / s), reason(c, "constant '%s' of node '%s' is not float",
                                               c->g->values[v].name, n->label));
      continue;
    }
    add_edit(c, v, al, ch, s, res, -1);
  }
  track(c, y, res, (int)(ch / s), s);
}

/* BatchNormalization / InstanceNormalization: per-channel parameters. */
static void norm_node(cp *c, int ni) {
  const rc_node *n = &c->g->nodes[ni];
  int x = n->in[0];
  if (!c->vc[x].slot || c->vc[x].s != 1 || any_extra_output_used(c, n)) {
    fix_inputs(c, n, "node '%s' (%s) cannot be narrowed here");
    return;
  }
  for (int i = 1; i < n->n_in; i++) {
    int v = n->in[i];
    if (v < 0) continue;
    if (!is_float_init(c->g, v) || c->g->values[v].decl.rank != 1) {
      fix_inputs(c, n, "node '%s' (%s) has a parameter that is not a float (C) initializer");
      return;
    }
  }
  for (int i = 1; i < n->n_in; i++)
    if (n->in[i] >= 0) add_edit(c, n->in[i], 0, c->vc[x].c, 1, c->vc[x].slot, -1);
  track(c, n->out[0], c->vc[x].slot, c->vc[x].c, 1);
}

/* Pools and resizes: channel k in is channel k out. */
static void passthrough_node(cp *c, int ni) {
  const rc_node *n = &c->g->nodes[ni];
  int x = n->in[0];
  int bad = any_extra_output_used(c, n) || !c->vc[x].slot || c->vc[x].s != 1;
  for (int i = 1; i < n->n_in; i++) bad |= n->in[i] >= 0 && c->vc[n->in[i]].slot != NULL;
  if (is_op(n, "Resize") && n->n_in > 3 && n->in[3] >= 0 && rc_tensor_numel(shape_of(c, n->in[3])) > 0)
    bad = 1; /* target sizes include the channel count */
  if (is_op(n, "Pad")) {
    const rc_tensor *xt = shape_of(c, x);
    const rc_attr *pa = rc__attr_find(n, "pads");
    int64_t lo = 0, hi = 0;
    if (pa && pa->n == 2 * xt->rank) {
      lo = pa->ints[1];
      hi = pa->ints[xt->rank + 1];
    } else if (n->n_in > 1 && n->in[1] >= 0 && rc_plan_is_const(c->p, n->in[1]) &&
               rc_tensor_numel(shape_of(c, n->in[1])) == 2 * xt->rank) {
      lo = rc__int_at(shape_of(c, n->in[1]), 1);
      hi = rc__int_at(shape_of(c, n->in[1]), xt->rank + 1);
    } else {
      bad = 1;
    }
    bad |= lo != 0 || hi != 0 || (n->n_in > 3 && n->in[3] >= 0); /* channel pads, axes input */
  }
  if (bad) {
    fix_inputs(c, n, "node '%s' (%s) cannot pass narrowed channels through");
    return;
  }
  track(c, n->out[0], c->vc[x].slot, c->vc[x].c, 1);
}

static void flatten_node(cp *c, int ni) {
  const rc_node *n = &c->g->nodes[ni];
  int x = n->in[0];
  const rc_tensor *xt = shape_of(c, x);
  int64_t axis = rc__attr_int(n, "axis", 1);
  if (axis < 0) axis += xt->rank;
  if (!c->vc[x].slot || axis != 1) {
    fix_inputs(c, n, "node '%s' (%s) does not flatten from the channel axis");
    return;
  }
  int64_t rest = 1;
  for (int d = 2; d < xt->rank; d++) rest *= xt->dims[d];
  track(c, n->out[0], c->vc[x].slot, c->vc[x].c, c->vc[x].s * rest);
}

/* Reshape (N, C, ...) -> (N, C*rest) or (N, C, ...) keeping C: the target's
 * entry 1 is rewritten when it is an explicit count in an initializer. */
static void reshape_node(cp *c, int ni) {
  const rc_node *n = &c->g->nodes[ni];
  int x = n->in[0], sv = n->n_in > 1 ? n->in[1] : -1, y = n->out[0];
  if (!c->vc[x].slot || sv < 0) {
    fix_inputs(c, n, "node '%s' (%s) has no target shape input");
    return;
  }
  const rc_tensor *xt = shape_of(c, x), *yt = shape_of(c, y), *st = shape_of(c, sv);
  int64_t rest_in = 1, rest_out = 1;
  for (int d = 2; d < xt->rank; d++) rest_in *= xt->dims[d];
  for (int d = 2; d < yt->rank; d++) rest_out *= yt->dims[d];
  int64_t s_out;
  if (yt->rank < 2 || xt->dims[0] != yt->dims[0]) s_out = 0;
  else if (yt->dims[1] == xt->dims[1] && rest_out == rest_in) s_out = c->vc[x].s;
  else if (yt->rank == 2 && yt->dims[1] == xt->dims[1] * rest_in) s_out = c->vc[x].s * rest_in;
  else s_out = 0;
  if (!s_out || !rc_plan_is_const(c->p, sv) || !st->data || rc_tensor_numel(st) != yt->rank) {
    fix_inputs(c, n, "node '%s' (%s) reshapes across the channel axis");
    return;
  }
  int64_t entry = rc__int_at(st, 1);
  if (entry != -1 && entry != 0) {
    if (c->g->values[sv].kind != RC_VALUE_INITIALIZER) {
      fix_inputs(c, n, "node '%s' (%s) has a target shape holding the channel count that is not an initializer");
      return;
    }
    add_edit(c, sv, -1, (int64_t)c->vc[x].c * s_out, s_out, c->vc[x].slot, -1);
  }
  track(c, y, c->vc[x].slot, c->vc[x].c, s_out);
}

static void concat_node(cp *c, int ni) {
  const rc_node *n = &c->g->nodes[ni];
  const rc_tensor *yt = shape_of(c, n->out[0]);
  int64_t axis = rc__attr_int(n, "axis", 1);
  if (axis < 0) axis += yt->rank;
  if (axis != 1) {
    channelwise_node(c, ni);
    return;
  }
  int total = (int)yt->dims[1];
  int *slot = rc__arena_alloc(&c->arena, sizeof(int) * (size_t)(total + 1));
  if (!slot) {
    c->st = rc__fail(c->e, RC_ERR_NOMEM, "out of memory");
    return;
  }
  int at = 0;
  for (int i = 0; i < n->n_in && at <= total; i++) {
    int v = n->in[i];
    if (v < 0) continue;
    int64_t ch = shape_of(c, v)->dims[1];
    if (at + ch > total) break;
    if (c->vc[v].slot && c->vc[v].s == 1) {
      memcpy(slot + at, c->vc[v].slot, sizeof(int) * (size_t)ch);
    } else {
      /* An untracked part keeps its channels. */
      int why = reason(c, "node '%s' (Concat) joins a tensor recoup does not track", n->label);
      fix_value(c, v, why);
      int *fresh = new_slots(c, (int)ch, -1);
      if (!fresh) return;
      fix_slots(c, fresh, (int)ch, why);
      memcpy(slot + at, fresh, sizeof(int) * (size_t)ch);
    }
    at += (int)ch;
  }
  if (at != total) {
    fix_inputs(c, n, "node '%s' (%s) has inputs that do not add up to its output");
    return;
  }
  track(c, n->out[0], slot, total, 1);
}

/* Reductions over spatial axes only. */
static void reduce_node(cp *c, int ni) {
  const rc_node *n = &c->g->nodes[ni];
  int x = n->in[0];
  const rc_tensor *xt = shape_of(c, x);
  int64_t axes[RC_MAX_RANK];
  int na = 0, ok = c->vc[x].slot && c->vc[x].s == 1;
  const rc_attr *aa = rc__attr_find(n, "axes");
  if (aa && aa->n <= RC_MAX_RANK) {
    for (int i = 0; i < aa->n; i++) axes[na++] = aa->ints[i];
  } else if (n->n_in > 1 && n->in[1] >= 0 && rc_plan_is_const(c->p, n->in[1]) &&
             rc_tensor_numel(shape_of(c, n->in[1])) <= RC_MAX_RANK) {
    const rc_tensor *at = shape_of(c, n->in[1]);
    for (int64_t i = 0; i < rc_tensor_numel(at); i++) axes[na++] = rc__int_at(at, i);
  }
  if (na == 0) ok = 0; /* every axis */
  for (int i = 0; i < na; i++) {
    int64_t a = axes[i] < 0 ? axes[i] + xt->rank : axes[i];
    if (a < 2) ok = 0;
  }
  if (!ok) {
    fix_inputs(c, n, "node '%s' (%s) reduces over the channel axis");
    return;
  }
  track(c, n->out[0], c->vc[x].slot, c->vc[x].c, 1);
}

static const char *const channelwise_ops[] = {
    "Relu", "LeakyRelu", "PRelu", "Elu", "Selu", "Celu", "Sigmoid", "HardSigmoid", "HardSwish", "Tanh",
    "Softplus", "Softsign", "Gelu", "Erf", "Clip", "Identity", "Dropout", "Abs", "Neg", "Exp", "Log",
    "Sqrt", "Reciprocal", "Floor", "Ceil", "Round", "Sin", "Cos", "Mish", "ThresholdedRelu", "Add", "Sub",
    "Mul", "Div", "Max", "Min", "Sum", "Mean", "Pow", "Where", NULL};
static const char *const passthrough_ops[] = {"MaxPool", "AveragePool", "GlobalAveragePool", "GlobalMaxPool",
                                              "LpPool", "GlobalLpPool", "Resize", "Upsample", "Pad", NULL};
static const char *const reduce_ops[] = {"ReduceMean", "ReduceMax", "ReduceMin", "ReduceSum", "ReduceL1",
                                         "ReduceL2", "ReduceProd", "ReduceLogSumExp", "ReduceSumSquare",
                                         NULL};
/* Ops that read only the shape of a tracked value; the written model is
 * planned again, so a shape computed from a narrowed tensor is checked. */
static const char *const shape_only_ops[] = {"Shape", "Size", NULL};

static void walk_node(cp *c, int ni) {
  const rc_node *n = &c->g->nodes[ni];
  if (n->n_out < 1 || n->out[0] < 0 || n->n_in < 1 || n->in[0] < 0) {
    fix_inputs(c, n, "node '%s' (%s) has no main input or output");
    return;
  }
  if (*n->domain && strcmp(n->domain, "ai.onnx")) {
    fix_inputs(c, n, "node '%s' (%s) is outside the default domain");
    return;
  }
  if (shape_of(c, n->in[0])->rank < 2 && !op_in(n, shape_only_ops)) {
    fix_inputs(c, n, "node '%s' (%s) reads a tensor of rank below 2");
    return;
  }
  if (is_op(n, "Conv") || is_op(n, "ConvTranspose")) conv_node(c, ni);
  else if (is_op(n, "Gemm") || is_op(n, "MatMul")) dense_node(c, ni);
  else if (is_op(n, "BatchNormalization") || is_op(n, "InstanceNormalization")) norm_node(c, ni);
  else if (op_in(n, channelwise_ops)) channelwise_node(c, ni);
  else if (op_in(n, passthrough_ops)) passthrough_node(c, ni);
  else if (op_in(n, reduce_ops)) reduce_node(c, ni);
  else if (is_op(n, "Flatten")) flatten_node(c, ni);
  else if (is_op(n, "Reshape")) reshape_node(c, ni);
  else if (is_op(n, "Concat")) concat_node(c, ni);
  else if (!op_in(n, shape_only_ops)) fix_inputs(c, n, "node '%s' (%s) is an op recoup cannot narrow");
}

/* ------------------------------------------------------------ deciding */

typedef struct cls {
  int root, comp;
  float score;
} cls;

static int cls_cmp(const void *pa, const void *pb) {
  const cls *a = pa, *b = pb;
  if (a->comp != b->comp) return a->comp < b->comp ? -1 : 1;
  if (a->score != b->score) return a->score < b->score ? -1 : 1;
  return (a->root > b->root) - (a->root < b->root);
}

static int find_src(int *sp, int a) {
  while (sp[a] != a) a = sp[a] = sp[sp[a]];
  return a;
}

/* Mark removed[root] for the lowest-scoring free classes: round(F * classes)
 * per group of sources joined through shared channels; every source keeps
 * at least one channel. */
static rc_status decide(cp *c, double frac, unsigned char *removed) {
  int ns = c->n_slots;
  int *sp = rc__malloc(sizeof(int) * (size_t)(c->n_src + 1));
  float *sum = rc__calloc((size_t)ns + 1, sizeof(float));
  int *first_src = rc__malloc(sizeof(int) * (size_t)(ns + 1));
  cls *list = rc__malloc(sizeof(cls) * (size_t)(ns + 1));
  int *kept = rc__calloc((size_t)c->n_src + 1, sizeof(int));
  rc_status st = RC_OK;
  if (!sp || !sum || !first_src || !list || !kept) {
    st = rc__fail(c->e, RC_ERR_NOMEM, "out of memory");
    goto out;
  }
  for (int s = 0; s < c->n_src; s++) sp[s] = s;
  for (int i = 0; i < ns; i++) first_src[i] = -1;
  for (int i = 0; i < ns; i++) {
    int r = find(c, i);
    sum[r] += c->score[i];
    if (c->src[i] < 0) continue;
    if (first_src[r] < 0) first_src[r] = c->src[i];
    else {
      int a = find_src(sp, first_src[r]), b = find_src(sp, c->src[i]);
      if (a != b) sp[b] = a;
    }
  }
  int nl = 0;
  for (int i = 0; i < ns; i++)
    if (find(c, i) == i && first_src[i] >= 0) list[nl++] = (cls){i, find_src(sp, first_src[i]), sum[i]};
  qsort(list, (size_t)nl, sizeof *list, cls_cmp);
  for (int a = 0; a < nl;) {
    int b = a;
    while (b < nl && list[b].comp == list[a].comp) b++;
    int64_t want = (int64_t)floor(frac * (double)(b - a) + 0.5);
    for (int k = a; k < b && want > 0; k++)
      if (!c->fixed[list[k].root]) {
        removed[list[k].root] = 1;
        want--;
      }
    a = b;
  }
  /* No layer may lose every channel: give back its best class. */
  for (int i = 0; i < ns; i++)
    if (c->src[i] >= 0 && !removed[find(c, i)]) kept[c->src[i]] = 1;
  for (int s = 0; s < c->n_src; s++) {
    if (kept[s]) continue;
    int best = -1;
    for (int i = 0; i < ns; i++)
      if (c->src[i] == s && (best < 0 || sum[find(c, i)] > sum[find(c, best)])) best = i;
    if (best >= 0) {
      removed[find(c, best)] = 0;
      s = -1; /* a class given back may serve other sources: recount */
      memset(kept, 0, sizeof(int) * (size_t)c->n_src);
      for (int i = 0; i < ns; i++)
        if (c->src[i] >= 0 && !removed[find(c, i)]) kept[c->src[i]] = 1;
    }
  }
out:
  rc__free(sp);
  rc__free(sum);
  rc__free(first_src);
  rc__free(list);
  rc__free(kept);
  return st;
}

/* ------------------------------------------------------------ applying */

int rc__prune_changed_add(int **list, int *n, int v) {
  for (int i = 0; i < *n; i++)
    if ((*list)[i] == v) return 1;
  int *grown = rc__realloc(*list, sizeof(int) * (size_t)(*n + 1));
  if (!grown) return 0;
  *list = grown;
  (*list)[(*n)++] = v;
  return 1;
}

static int slot_kept(cp *c, const unsigned char *removed, int slot) { return !removed[find(c, slot)]; }

static int64_t kept_count(cp *c, const unsigned char *removed, const edit *d) {
  int64_t k = 0;
  for (int64_t i = 0; i < d->n / d->s; i++) k += slot_kept(c, removed, d->slot[i]);
  return k;
}

/* Keep the slices of initializer d->value along d->axis whose slot stays. */
static rc_status shrink_tensor(cp *c, const unsigned char *removed, const edit *d) {
  const rc_tensor *t = &c->g->values[d->value].decl;
  if (d->axis >= t->rank || t->dims[d->axis] != d->n)
    return rc__fail(c->e, RC_ERR_SHAPE, "%s: initializer '%s' changed shape during pruning", c->m->path,
                    c->g->values[d->value].name);
  int64_t keep = kept_count(c, removed, d) * d->s;
  if (keep == d->n) return RC_OK;
  int64_t inner = 1, outer = 1;
  for (int k = d->axis + 1; k < t->rank; k++) inner *= t->dims[k];
  for (int k = 0; k < d->axis; k++) outer *= t->dims[k];
  size_t es = rc_dtype_size(t->dtype), row = (size_t)inner * es;
  rc_tensor nt = *t;
  nt.dims[d->axis] = keep;
  nt.data = rc__malloc((size_t)(outer * keep) * row + 1);
  if (!nt.data) return rc__fail(c->e, RC_ERR_NOMEM, "out of memory");
  char *dst = nt.data;
  const char *src = t->data;
  for (int64_t o = 0; o < outer; o++)
    for (int64_t i = 0; i < d->n; i++)
      if (slot_kept(c, removed, d->slot[i / d->s])) {
        memcpy(dst, src + (size_t)(o * d->n + i) * row, row);
        dst += row;
      }
  rc_status st = rc_model_resize_initializer(c->m, d->value, &nt, c->e);
  rc__free(nt.data);
  return st;
}

static rc_status apply_edits(cp *c, const unsigned char *removed, int **changed, int *n_changed) {
  for (int i = 0; i < c->n_edits; i++) {
    const edit *d = &c->edits[i];
    if (d->axis >= 0) {
      RC_TRY(shrink_tensor(c, removed, d));
      if (d->node >= 0)
        RC_TRY(rc_model_set_attr_int(c->m, d->node, "group", kept_count(c, removed, d), c->e));
    } else {
      /* Reshape target: entry 1 = kept channels * features per channel. */
      rc_tensor *t = &c->g->values[d->value].decl;
      int64_t v = kept_count(c, removed, d) * d->s;
      if (t->dtype == RC_DTYPE_INT64) ((int64_t *)t->data)[1] = v;
      else if (t->dtype == RC_DTYPE_INT32) ((int32_t *)t->data)[1] = (int32_t)v;
      else
        return rc__fail(c->e, RC_ERR_UNSUPPORTED, "%s: Reshape target '%s' is not int64", c->m->path,
                        c->g->values[d->value].name);
    }
    if (!rc__prune_changed_add(changed, n_changed, d->value)) return rc__fail(c->e, RC_ERR_NOMEM, "out of memory");
  }
  for (int v = 0; v < c->g->n_values; v++) {
    const vchan *vc = &c->vc[v];
    if (!vc->slot || c->g->values[v].kind == RC_VALUE_INITIALIZER) continue;
    int lost = 0;
    for (int k = 0; k < vc->c && !lost; k++) lost = !slot_kept(c, removed, vc->slot[k]);
    if (lost) RC_TRY(rc_model_forget_value_info(c->m, v, c->e));
  }
  return RC_OK;
}

/* Say for each prunable layer whose channels all stayed why that was. */
static void channel_notes(cp *c, const unsigned char *removed, const layer *ls, int nl) {
  for (int li = 0; li < nl; li++) {
    rc_prune_layer *pl = &c->r->layers[li];
    int src = -1;
    for (int s = 0; s < c->n_src; s++)
      if (c->src_node[s] == ls[li].node) src = s;
    if (src < 0) {
      const rc_node *n = &c->g->nodes[ls[li].node];
      if (!pl->note[0])
        snprintf(pl->note, sizeof pl->note, "%s", is_op(n, "Conv") && rc__attr_int(n, "group", 1) > 1
                                                       ? "depthwise: follows its input's channels"
                                                       : "channels not narrowed (unsupported layout)");
      continue;
    }
    int any_removed = 0, why = -1;
    for (int i = 0; i < c->n_slots; i++) {
      if (c->src[i] != src) continue;
      int r = find(c, i);
      any_removed |= removed[r];
      if (c->fixed[r] && why < 0) why = c->why[r];
    }
    if (!any_removed && why >= 0 && !pl->note[0])
      snprintf(pl->note, sizeof pl->note, "channels kept: %s", c->reasons[why]);
  }
}

/* Every reason that kept some channels, once, for the report. */
static rc_status refusal_notes(cp *c) {
  unsigned char *seen = rc__calloc((size_t)c->n_reasons + 1, 1);
  if (!seen) return rc__fail(c->e, RC_ERR_NOMEM, "out of memory");
  rc_status st = RC_OK;
  for (int i = 0; i < c->n_slots && st == RC_OK; i++) {
    int r = find(c, i), why = c->why[r];
    if (!c->fixed[r] || why < 0 || seen[why]) continue;
    seen[why] = 1;
    int on_layer = 0; /* already said beside a layer */
    for (int l = 0; l < c->r->n_layers && !on_layer; l++) on_layer = strstr(c->r->layers[l].note, c->reasons[why]) != NULL;
    if (!on_layer) st = add_note(c->r, c->e, "channels kept: %s", c->reasons[why]);
  }
  rc__free(seen);
  return st;
}

rc_status rc__prune_channels(rc_model *m, double frac, const layer *ls, int nl, rc_prune_report *r,
                             int **changed, int *n_changed, rc_err *e) {
  cp c;
  memset(&c, 0, sizeof c);
  c.m = m;
  c.g = &m->graph;
  c.r = r;
  c.e = e;
  c.st = RC_OK;
  c.last_node = nl ? ls[nl - 1].node : -1;
  rc__arena_init(&c.arena, 0);
  unsigned char *removed = NULL;
  rc_status st = rc__plan_batch1(&c.p, c.g, e);
  if (st != RC_OK) {
    rc__wrap(e, "%s: channel pruning plans the model at batch 1", m->path);
    goto out;
  }
  c.vc = rc__calloc((size_t)c.g->n_values + 1, sizeof(vchan));
  c.uses = rc__calloc((size_t)c.g->n_values + 1, sizeof(int));
  if (!c.vc || !c.uses) {
    st = rc__fail(e, RC_ERR_NOMEM, "out of memory");
    goto out;
  }
  for (int i = 0; i < c.g->n_nodes; i++)
    for (int k = 0; k < c.g->nodes[i].n_in; k++)
      if (c.g->nodes[i].in[k] >= 0) c.uses[c.g->nodes[i].in[k]]++;
  for (int i = 0; i < c.g->n_outputs; i++) c.uses[c.g->outputs[i]]++;
  for (int i = 0; i < c.g->n_nodes && c.st == RC_OK; i++) walk_node(&c, i);
  if (c.st == RC_OK) {
    int why = reason(&c, "its channels reach a graph output");
    for (int i = 0; i < c.g->n_outputs; i++) fix_value(&c, c.g->outputs[i], why);
  }
  if ((st = c.st) != RC_OK) goto out;
  removed = rc__calloc((size_t)c.n_slots + 1, 1);
  if (!removed) {
    st = rc__fail(e, RC_ERR_NOMEM, "out of memory");
    goto out;
  }
  if ((st = decide(&c, frac, removed)) != RC_OK) goto out;
  for (int i = 0; i < c.n_slots; i++) r->channels_removed += c.src[i] >= 0 && removed[find(&c, i)];
  if ((st = apply_edits(&c, removed, changed, n_changed)) != RC_OK) goto out;
  channel_notes(&c, removed, ls, nl);
  st = refusal_notes(&c);
out:
  rc__free(removed);
  rc_plan_free(c.p);
  rc__free(c.vc);
  rc__free(c.uses);
  rc__free(c.parent);
  rc__free(c.src);
  rc__free(c.why);
  rc__free(c.score);
  rc__free(c.fixed);
  rc__free(c.src_node);
  rc__free(c.edits);
  rc__free(c.reasons);
  rc__arena_free(&c.arena);
  return st;
}
