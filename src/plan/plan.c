/* The planner: shape inference over concrete input shapes, folding of
 * everything that is known before the first batch, memory layout, and the
 * forward and reverse passes over the remaining steps. */
#define _DEFAULT_SOURCE /* madvise */
#include "plan/plan.h"

#include <stdint.h>
#include <string.h>
#include <sys/mman.h>

#include "core/alloc.h"
#include "core/arena.h"
#include "ops/kernel_choice.h"
#include "plan/fuse.h"

/* A node that runs on every batch (folded nodes are not steps). */
typedef struct plan_step {
  int node;
  rc_kernel k;
  rc_op_state state;  /* the kernel's own, kept for the plan's life */
  int wants_backward; /* some input needs a gradient and some output has one */
} plan_step;

struct rc_plan {
  const rc_graph *g;
  rc_arena meta;          /* steps, pointer arrays, folded constants */
  rc_tensor *t;           /* per value */
  rc_tensor *grad;        /* per value; data NULL where no gradient is tracked */
  unsigned char *is_const;
  unsigned char *needs_grad;
  int n_steps;
  plan_step *steps;
  unsigned char *block;   /* activations, gradients, saved state, workspace */
  size_t block_bytes;
  unsigned char *grad_block; /* inside block: the part rc_plan_zero_grad clears */
  size_t grad_bytes;
  /* Gradients of inner values share room by lifetime; backward clears each
   * just before the first step (in reverse order) that may add into it:
   * those of step s are clear_value[clear_start[s] .. clear_start[s + 1]). */
  int *clear_start;
  int *clear_value;
  void *work;
  int training;
  size_t max_bytes;    /* limit on folded constants and the block together */
  size_t folded_bytes; /* constants folded so far */
  rc__chain *chains;   /* steps run as one (fuse.h) */
  int n_chains;
  int *role;     /* per step: 0, chain + 1 at its head, -1 absorbed */
  unsigned char *inner_grad; /* per value: its gradient is inner (mark_inner_grads) */
  int ran_fused; /* the last forward ran the chains (backward follows it) */
};

static const size_t ALIGN = 64;

static size_t round_up(size_t n) { return (n + ALIGN - 1) & ~(ALIGN - 1); }

static rc_status check_inputs(rc_plan *p, const rc_tensor *inputs, rc_err *e) {
  const rc_graph *g = p->g;
  for (int i = 0; i < g->n_inputs; i++) {
    const rc_value *val = &g->values[g->inputs[i]];
    const rc_tensor *given = &inputs[i];
    char sa[128], sb[128];
    if (val->decl.dtype != RC_DTYPE_UNDEFINED && given->dtype != val->decl.dtype)
      return rc__fail(e, RC_ERR_SHAPE, "%s: input '%s' has dtype %s, data gives %s", g->path, val->name,
                      rc_dtype_name(val->decl.dtype), rc_dtype_name(given->dtype));
    if (val->decl.rank >= 0) {
      int ok = given->rank == val->decl.rank;
      for (int d = 0; ok && d < given->rank; d++)
        if (val->decl.dims[d] >= 0 && val->decl.dims[d] != given->dims[d]) ok = 0;
      if (!ok)
        return rc__fail(e, RC_ERR_SHAPE, "%s: input '%s' expects shape %s, data gives %s", g->path,
                        val->name, rc_shape_str(&val->decl, sa, sizeof sa),
                        rc_shape_str(given, sb, sizeof sb));
    }
    rc_tensor tmp = *given;
    tmp.data = NULL;
    for (int d = 0; d < tmp.rank; d++)
      if (tmp.dims[d] < 0)
        return rc__fail(e, RC_ERR_SHAPE, "%s: input '%s': shape %s is not concrete", g->path, val->name,
                        rc_shape_str(given, sa, sizeof sa));
    p->t[g->inputs[i]] = tmp;
  }
  return RC_OK;
}

/* A value is "live" when it changes from batch to batch: graph inputs,
 * trainable initializers, and anything computed from them. */
static int node_is_foldable(const rc_plan *p, const rc_node *n, const unsigned char *live) {
  if (n->def->flags & RC_OP_SHAPE_ONLY) return 1;
  for (int i = 0; i < n->n_in; i++)
    if (n->in[i] >= 0 && live[n->in[i]]) return 0;
  (void)p;
  return 1;
}

static rc_status run_folded(rc_plan *p, const rc_node *n, rc_tensor **in, rc_tensor **out, rc_err *e) {
  rc_kernel k = {n, n->params, n->n_in, n->n_out, in, out, NULL, NULL, NULL, NULL, 0, 0, NULL, NULL, NULL};
  size_t ws = n->def->workspace ? n->def->workspace(&k, 0) : 0;
  size_t sv = n->def->saved ? n->def->saved(&k) : 0;
  if (ws > p->max_bytes || sv > p->max_bytes - ws)
    return rc__fail(e, RC_ERR_LIMIT, "node '%s' (%s): folding needs %zu bytes of scratch, over the plan limit of %zu",
                    n->label, n->op_type, ws + sv, p->max_bytes);
  void *work = ws ? rc__malloc(ws) : NULL;
  void *saved = sv ? rc__malloc(sv) : NULL;
  rc_status st;
  if ((ws && !work) || (sv && !saved)) {
    st = rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory while folding", n->label, n->op_type);
  } else {
    k.work = work;
    k.work_bytes = ws;
    k.saved = saved;
    st = n->def->forward(&k, e);
  }
  rc__free(work);
  rc__free(saved);
  return st;
}

/* Infer every node's outputs in order; fold the nodes whose inputs are all
 * known; collect the rest as steps. */

/* Room for a folded node's output in the plan's arena, within the plan's limit. */
static rc_status alloc_folded(rc_plan *p, const rc_graph *g, const rc_node *n, rc_tensor *t, rc_err *e) {
  size_t nb = rc_tensor_nbytes(t);
  if (nb > p->max_bytes - p->folded_bytes)
    return rc__fail(e, RC_ERR_LIMIT, "%s: node '%s' (%s): folded output of %zu bytes is over the plan limit of %zu",
                    g->path, n->label, n->op_type, nb, p->max_bytes);
  p->folded_bytes += nb;
  t->data = rc__arena_zalloc(&p->meta, nb ? nb : 1);
  if (!t->data) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory folding node '%s'", g->path, n->label);
  return RC_OK;
}

static rc_status infer_and_fold(rc_plan *p, const rc_plan_opts *o, unsigned char *live, rc_err *e) {
  const rc_graph *g = p->g;
  p->steps = rc__arena_zalloc(&p->meta, sizeof(plan_step) * (size_t)(g->n_nodes ? g->n_nodes : 1));
  if (!p->steps) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
  for (int ni = 0; ni < g->n_nodes; ni++) {
    const rc_node *n = &g->nodes[ni];
    rc_tensor **in = rc__arena_zalloc(&p->meta, sizeof(rc_tensor *) * (size_t)(n->n_in + 1));
    rc_tensor **out = rc__arena_zalloc(&p->meta, sizeof(rc_tensor *) * (size_t)(n->n_out + 1));
    rc_tensor *inferred = rc__arena_zalloc(&p->meta, sizeof(rc_tensor) * (size_t)(n->n_out + 1));
    if (!in || !out || !inferred) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
    for (int i = 0; i < n->n_in; i++) in[i] = n->in[i] >= 0 ? &p->t[n->in[i]] : NULL;
    rc_status st = n->def->infer(n, (const rc_tensor *const *)in, inferred, e);
    if (st != RC_OK) return rc__wrap(e, "%s", g->path);
    int fold = node_is_foldable(p, n, live);
    for (int j = 0; j < n->n_out; j++) {
      if (n->out[j] < 0) continue;
      rc_tensor *t = &p->t[n->out[j]];
      *t = inferred[j];
      t->data = NULL;
      if (rc__check_shape(n, t, e) != RC_OK) return rc__wrap(e, "%s", g->path);
      out[j] = t;
      if (!fold) live[n->out[j]] = 1;
    }
    if (fold) {
      for (int j = 0; j < n->n_out; j++) {
        if (!out[j]) continue;
        RC_TRY(alloc_folded(p, g, n, out[j], e));
        p->is_const[n->out[j]] = 1;
      }
      /* Optional outputs that nobody reads still need somewhere to go. */
      for (int j = 0; j < n->n_out; j++)
        if (!out[j]) {
          RC_TRY(alloc_folded(p, g, n, &inferred[j], e));
          out[j] = &inferred[j];
        }
      if (run_folded(p, n, in, out, e) != RC_OK) return rc__wrap(e, "%s", g->path);
      continue;
    }
    for (int j = 0; j < n->n_out; j++)
      if (!out[j]) out[j] = &inferred[j]; /* unused optional output: gets a buffer below */
    plan_step *s = &p->steps[p->n_steps++];
    s->node = ni;
    s->k = (rc_kernel){n, n->params, n->n_in, n->n_out, in, out, NULL, NULL, NULL, NULL,
                       o->bn_batch_stats, 0, o->reduce, NULL, &s->state};
  }
  return RC_OK;
}

/* Which values need a gradient: reachable from a trainable value through
 * differentiable steps, and leading to a value a loss reads. */
static rc_status mark_gradients(rc_plan *p, const rc_plan_opts *o, rc_err *e) {
  const rc_graph *g = p->g;
  int nv = g->n_values;
  unsigned char *req = p->needs_grad; /* first "requires", then narrowed */
  for (int v = 0; v < nv; v++) req[v] = o->trainable && o->trainable[v] ? 1 : 0;
  for (int s = 0; s < p->n_steps; s++) {
    const rc_node *n = &g->nodes[p->steps[s].node];
    if (!n->def->backward || (n->def->flags & RC_OP_NO_GRAD)) continue;
    int any = 0;
    for (int i = 0; i < n->n_in; i++)
      if (n->in[i] >= 0 && req[n->in[i]]) any = 1;
    if (!any) continue;
    for (int j = 0; j < n->n_out; j++)
      if (n->out[j] >= 0 && rc_dtype_is_float(p->t[n->out[j]].dtype)) req[n->out[j]] = 1;
  }
  unsigned char *useful = rc__calloc((size_t)nv + 1, 1);
  if (!useful) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
  for (int i = 0; i < g->n_outputs; i++) useful[g->outputs[i]] = 1;
  if (o->keep)
    for (int v = 0; v < nv; v++)
      if (o->keep[v]) useful[v] = 1;
  for (int s = p->n_steps - 1; s >= 0; s--) {
    const rc_node *n = &g->nodes[p->steps[s].node];
    int out_useful = 0;
    for (int j = 0; j < n->n_out; j++)
      if (n->out[j] >= 0 && useful[n->out[j]] && req[n->out[j]]) out_useful = 1;
    if (!out_useful) continue;
    for (int i = 0; i < n->n_in; i++)
      if (n->in[i] >= 0) useful[n->in[i]] = 1;
  }
  for (int v = 0; v < nv; v++) req[v] = req[v] && useful[v];
  rc__free(useful);
  for (int s = 0; s < p->n_steps; s++) {
    const rc_node *n = &g->nodes[p->steps[s].node];
    int in_g = 0, out_g = 0;
    for (int i = 0; i < n->n_in; i++)
      if (n->in[i] >= 0 && req[n->in[i]]) in_g = 1;
    for (int j = 0; j < n->n_out; j++)
      if (n->out[j] >= 0 && req[n->out[j]]) out_g = 1;
    p->steps[s].wants_backward = in_g && out_g && n->def->backward != NULL;
  }
  return RC_OK;
}

typedef struct slot {
  size_t offset, size;
  int first, last; /* step indices of the value's lifetime */
} slot;

/* Greedy first-fit placement of buffers whose lifetimes overlap. Values are
 * placed in order of first use; O(n^2), fine for graphs of thousands of nodes. */
static size_t place_slots(slot *sl, int n) {
  size_t top = 0;
  for (int i = 0; i < n; i++) {
    if (!sl[i].size) continue;
    size_t off = 0;
    int moved = 1;
    while (moved) {
      moved = 0;
      for (int j = 0; j < i; j++) {
        if (!sl[j].size) continue;
        if (sl[j].last < sl[i].first || sl[i].last < sl[j].first) continue;
        if (off < sl[j].offset + sl[j].size && sl[j].offset < off + sl[i].size) {
          off = sl[j].offset + sl[j].size;
          moved = 1;
        }
      }
    }
    sl[i].offset = off;
    if (off + sl[i].size > top) top = off + sl[i].size;
  }
  return top;
}

/* Gradients of inner values: produced by a step, neither a graph output
 * nor kept, so no caller seeds or reads them (rc_plan_zero_grad leaves them
 * to backward). */
static rc_status mark_inner_grads(rc_plan *p, const rc_plan_opts *o, rc_err *e) {
  const rc_graph *g = p->g;
  p->inner_grad = rc__arena_zalloc(&p->meta, (size_t)g->n_values + 1);
  if (!p->inner_grad) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
  for (int s = 0; s < p->n_steps; s++) {
    const rc_node *n = &g->nodes[p->steps[s].node];
    for (int j = 0; j < n->n_out; j++)
      if (n->out[j] >= 0 && p->needs_grad[n->out[j]]) p->inner_grad[n->out[j]] = 1;
  }
  for (int i = 0; i < g->n_outputs; i++) p->inner_grad[g->outputs[i]] = 0;
  for (int v = 0; o->keep && v < g->n_values; v++)
    if (o->keep[v]) p->inner_grad[v] = 0;
  return RC_OK;
}

static void widen(slot *sl, int v, int first, int last) {
  if (v < 0) return;
  if (sl[v].first < 0 || first < sl[v].first) sl[v].first = first;
  if (last > sl[v].last) sl[v].last = last;
}

/* Room for the inner gradients, placed like activations by lifetime in step
 * indices: from the step producing the value (its backward reads the
 * gradient last) to the last step reading it (the first, in reverse order,
 * to add into it); a chain's values live over the whole chain, whose
 * backward runs at its head. Builds the clearing lists backward follows. */
static rc_status place_inner_grads(rc_plan *p, slot *sl, size_t *bytes) {
  const rc_graph *g = p->g;
  const int nv = g->n_values, ns = p->n_steps;
  for (int v = 0; v < nv; v++) sl[v].first = sl[v].last = -1;
  for (int s = 0; s < ns; s++) {
    const rc_node *n = &g->nodes[p->steps[s].node];
    for (int j = 0; j < n->n_out; j++) widen(sl, n->out[j], s, s);
    for (int i = 0; i < n->n_in; i++) widen(sl, n->in[i], s, s);
  }
  for (int s = 0; s < ns; s++) {
    if (p->role[s] <= 0) continue;
    const rc__chain *c = &p->chains[p->role[s] - 1];
    const rc_kernel *member[3] = {c->conv, c->bn, c->act};
    for (int m = 0; m < 3; m++) {
      if (!member[m]) continue;
      const rc_node *n = member[m]->node;
      for (int j = 0; j < n->n_out; j++) widen(sl, n->out[j], s, c->last);
      for (int i = 0; i < n->n_in; i++) widen(sl, n->in[i], s, c->last);
    }
  }
  for (int v = 0; v < nv; v++) sl[v].size = p->inner_grad[v] ? round_up(rc_tensor_nbytes(&p->t[v])) : 0;
  *bytes = place_slots(sl, nv);
  p->clear_start = rc__arena_zalloc(&p->meta, sizeof(int) * (size_t)(ns + 2));
  p->clear_value = rc__arena_zalloc(&p->meta, sizeof(int) * (size_t)(nv + 1));
  if (!p->clear_start || !p->clear_value) return RC_ERR_NOMEM;
  for (int v = 0; v < nv; v++)
    if (p->inner_grad[v]) p->clear_start[sl[v].last + 1]++;
  for (int s = 0; s < ns; s++) p->clear_start[s + 1] += p->clear_start[s];
  int *fill = rc__calloc((size_t)ns + 1, sizeof(int));
  if (!fill) return RC_ERR_NOMEM;
  for (int v = 0; v < nv; v++)
    if (p->inner_grad[v]) {
      const int s = sl[v].last;
      p->clear_value[p->clear_start[s] + fill[s]++] = v;
    }
  rc__free(fill);
  return RC_OK;
}

/* A plan's block is written all over by the first batch, and every 4 KiB
 * page first touched costs a fault, which is dear under a hypervisor (5-7%
 * of a whole distill run in perf, most of the kernel time). Asking for
 * large pages turns them into one fault per 2 MiB where the system grants
 * them (Linux, transparent huge pages in "madvise" mode). Advice only:
 * nothing depends on it being taken. */
static void advise_large_pages(void *p, size_t n) {
#if defined(__linux__) && defined(MADV_HUGEPAGE)
  const uintptr_t huge = (uintptr_t)2 << 20;
  const uintptr_t lo = ((uintptr_t)p + huge - 1) & ~(huge - 1), hi = ((uintptr_t)p + n) & ~(huge - 1);
  if (hi > lo) (void)madvise((void *)lo, hi - lo, MADV_HUGEPAGE);
#else
  (void)p, (void)n;
#endif
}

static rc_status layout_memory(rc_plan *p, const rc_plan_opts *o, rc_err *e) {
  const rc_graph *g = p->g;
  int nv = g->n_values;
  slot *sl = rc__calloc((size_t)nv + 1, sizeof(slot));
  if (!sl) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
  int end = p->n_steps;
  for (int v = 0; v < nv; v++) {
    sl[v].first = -1;
    sl[v].last = -1;
  }
  for (int i = 0; i < g->n_inputs; i++) {
    sl[g->inputs[i]].first = 0;
    sl[g->inputs[i]].last = end;
  }
  for (int s = 0; s < p->n_steps; s++) {
    const rc_node *n = &g->nodes[p->steps[s].node];
    for (int j = 0; j < n->n_out; j++)
      if (n->out[j] >= 0) sl[n->out[j]].first = sl[n->out[j]].last = s;
    for (int i = 0; i < n->n_in; i++) {
      int v = n->in[i];
      if (v >= 0 && !p->is_const[v] && g->values[v].kind != RC_VALUE_INITIALIZER && sl[v].last < s)
        sl[v].last = s;
    }
  }
  for (int i = 0; i < g->n_outputs; i++) sl[g->outputs[i]].last = end;
  /* A chain writes its result when its Conv runs and reads the Conv's
   * output until its last step: both stay in place over the whole chain. */
  for (int s = 0; s < p->n_steps; s++) {
    if (p->role[s] <= 0) continue;
    const rc__chain *c = &p->chains[p->role[s] - 1];
    const rc_node *tail = (c->act ? c->act : c->bn)->node;
    int y = g->nodes[p->steps[s].node].out[0];
    if (sl[y].last < c->last) sl[y].last = c->last;
    sl[tail->out[0]].first = s;
  }
  for (int v = 0; v < nv; v++) {
    if (g->values[v].kind == RC_VALUE_INITIALIZER || p->is_const[v] || sl[v].first < 0) continue;
    if ((o->keep && o->keep[v]) || p->training) sl[v].last = end; /* training keeps everything */
    sl[v].size = round_up(rc_tensor_nbytes(&p->t[v]));
  }
  /* Unused optional outputs of steps get private buffers (size known from their kernel). */
  size_t extra = 0;
  for (int s = 0; s < p->n_steps; s++) {
    const rc_node *n = &g->nodes[p->steps[s].node];
    for (int j = 0; j < n->n_out; j++)
      if (n->out[j] < 0) extra += round_up(rc_tensor_nbytes(p->steps[s].k.out[j]));
  }
  size_t act = place_slots(sl, nv);
  /* Gradients the caller seeds or reads: one contiguous block, so zeroing
   * is one memset; those of inner values share room by lifetime. */
  size_t grads = 0, inner = 0;
  for (int v = 0; v < nv; v++)
    if (p->needs_grad[v] && !p->inner_grad[v]) grads += round_up(rc_tensor_nbytes(&p->t[v]));
  slot *gsl = p->training ? rc__calloc((size_t)nv + 1, sizeof(slot)) : NULL;
  if (p->training && (!gsl || place_inner_grads(p, gsl, &inner) != RC_OK)) {
    rc__free(gsl);
    rc__free(sl);
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
  }
  size_t saved = 0, work = 0;
  for (int s = 0; s < p->n_steps; s++) {
    rc_kernel *k = &p->steps[s].k;
    const rc_op_def *d = k->node->def;
    if (p->training && d->saved) saved += round_up(d->saved(k));
    size_t w0 = d->workspace ? d->workspace(k, 0) : 0;
    size_t w1 = d->workspace && p->steps[s].wants_backward ? d->workspace(k, 1) : 0;
    if (w0 > work) work = w0;
    if (w1 > work) work = w1;
    if (p->steps[s].state.out_of_memory) {
      rc__free(gsl);
      rc__free(sl);
      return rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory", k->node->label, k->node->op_type);
    }
  }
  work = round_up(work);
  size_t total = act + extra + grads + inner + saved + work + ALIGN;
  if (total > p->max_bytes - p->folded_bytes) {
    rc__free(gsl);
    rc__free(sl);
    return rc__fail(e, RC_ERR_LIMIT, "%s: the plan needs %zu bytes, over its limit of %zu", g->path,
                    total + p->folded_bytes, p->max_bytes);
  }
  p->block = rc__malloc(total);
  if (!p->block) {
    rc__free(gsl);
    rc__free(sl);
    return rc__fail(e, RC_ERR_NOMEM, "%s: cannot allocate %zu bytes for a plan", g->path, total);
  }
  p->block_bytes = total;
  advise_large_pages(p->block, total);
  unsigned char *base = (unsigned char *)(((uintptr_t)p->block + ALIGN - 1) & ~(uintptr_t)(ALIGN - 1));
  for (int v = 0; v < nv; v++) {
    if (sl[v].size) p->t[v].data = base + sl[v].offset;
    /* An empty activation still gets a valid address (of no bytes), so
     * kernels may offset and memcpy it by zero without special cases. */
    else if (sl[v].first >= 0 && g->values[v].kind != RC_VALUE_INITIALIZER && !p->is_const[v])
      p->t[v].data = base;
  }
  unsigned char *cur = base + act;
  for (int s = 0; s < p->n_steps; s++) {
    const rc_node *n = &g->nodes[p->steps[s].node];
    for (int j = 0; j < n->n_out; j++)
      if (n->out[j] < 0) {
        rc_tensor *t = p->steps[s].k.out[j];
        t->data = cur;
        cur += round_up(rc_tensor_nbytes(t));
      }
  }
  p->grad_block = cur;
  p->grad_bytes = grads;
  for (int v = 0; v < nv; v++) {
    p->grad[v] = p->t[v];
    p->grad[v].data = NULL;
    if (p->needs_grad[v] && !p->inner_grad[v]) {
      p->grad[v].data = cur;
      cur += round_up(rc_tensor_nbytes(&p->t[v]));
    }
  }
  memset(p->grad_block, 0, grads);
  for (int v = 0; v < nv; v++)
    if (p->inner_grad[v]) p->grad[v].data = cur + gsl[v].offset;
  cur += inner;
  rc__free(gsl);
  for (int s = 0; s < p->n_steps; s++) {
    rc_kernel *k = &p->steps[s].k;
    const rc_op_def *d = k->node->def;
    if (p->training && d->saved) {
      k->saved = cur;
      cur += round_up(d->saved(k));
    }
  }
  p->work = cur;
  for (int s = 0; s < p->n_steps; s++) {
    p->steps[s].k.work = p->work;
    p->steps[s].k.work_bytes = work;
  }
  rc__free(sl);
  return RC_OK;
}

/* Chains of steps that may run as one: see fuse.h. */
static rc_status find_chains(rc_plan *p, const rc_plan_opts *o, rc_err *e) {
  const rc_graph *g = p->g;
  int *step_of_node = rc__arena_zalloc(&p->meta, sizeof(int) * (size_t)(g->n_nodes + 1));
  rc_kernel **step_k = rc__arena_zalloc(&p->meta, sizeof(rc_kernel *) * (size_t)(p->n_steps + 1));
  unsigned char *held = rc__arena_zalloc(&p->meta, (size_t)g->n_values + 1);
  if (!step_of_node || !step_k || !held)
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
  for (int ni = 0; ni < g->n_nodes; ni++) step_of_node[ni] = -1;
  for (int s = 0; s < p->n_steps; s++) {
    step_of_node[p->steps[s].node] = s;
    step_k[s] = &p->steps[s].k;
  }
  for (int i = 0; i < g->n_outputs; i++) held[g->outputs[i]] = 1;
  for (int v = 0; o->keep && v < g->n_values; v++) held[v] |= o->keep[v];
  return rc__chains_find(&p->chains, &p->n_chains, &p->role, g, step_k, p->n_steps, step_of_node, held,
                         p->is_const, &p->meta, e);
}

static rc_status build_gradient_views(rc_plan *p, rc_err *e) {
  const rc_graph *g = p->g;
  for (int s = 0; s < p->n_steps; s++) {
    if (!p->steps[s].wants_backward) continue;
    const rc_node *n = &g->nodes[p->steps[s].node];
    rc_tensor **din = rc__arena_zalloc(&p->meta, sizeof(rc_tensor *) * (size_t)(n->n_in + 1));
    rc_tensor **dout = rc__arena_zalloc(&p->meta, sizeof(rc_tensor *) * (size_t)(n->n_out + 1));
    if (!din || !dout) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
    for (int i = 0; i < n->n_in; i++)
      din[i] = n->in[i] >= 0 && p->needs_grad[n->in[i]] ? &p->grad[n->in[i]] : NULL;
    for (int j = 0; j < n->n_out; j++)
      dout[j] = n->out[j] >= 0 && p->needs_grad[n->out[j]] ? &p->grad[n->out[j]] : NULL;
    p->steps[s].k.din = din;
    p->steps[s].k.dout = dout;
  }
  return RC_OK;
}

/* Hand opts.patterns to the steps that read a patterned value as their
 * weight, before workspaces are sized (layout_memory). */
static rc_status attach_patterns(rc_plan *p, const rc__wpattern *const *patterns, rc_err *e) {
  const rc_graph *g = p->g;
  for (int v = 0; patterns && v < g->n_values; v++) {
    const rc__wpattern *pat = patterns[v];
    if (!pat) continue;
    const rc_tensor *t = &p->t[v];
    if (p->is_const[v] || t->rank < 2 || t->dtype != RC_DTYPE_FLOAT || !t->dims[0] || pat->rows != t->dims[0] ||
        pat->cols != rc_tensor_numel(t) / t->dims[0])
      return rc__fail(e, RC_ERR_INVALID,
                      "%s: '%s' cannot take its weight pattern (it needs a float weight of "
                      "rank 2 or more that the plan keeps trainable, of %lld rows and %lld columns)",
                      g->path, g->values[v].name, (long long)pat->rows, (long long)pat->cols);
  }
  for (int s = 0; patterns && s < p->n_steps; s++) {
    const rc_node *n = &g->nodes[p->steps[s].node];
    if ((n->def->flags & RC_OP_SPARSE_WEIGHT) && n->n_in >= 2 && n->in[1] >= 0)
      p->steps[s].k.pattern = patterns[n->in[1]];
  }
  return RC_OK;
}

rc_status rc_plan_init(rc_plan **out, const rc_graph *g, const rc_tensor *inputs,
                       const rc_plan_opts *opts, rc_err *e) {
  *out = NULL;
  rc_plan_opts none = {0};
  const rc_plan_opts *o = opts ? opts : &none;
  rc_plan *p = rc__calloc(1, sizeof *p);
  if (!p) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
  p->g = g;
  p->training = o->training;
  p->max_bytes = o->max_bytes ? o->max_bytes : RC_PLAN_DEFAULT_MAX_BYTES;
  rc__arena_init(&p->meta, 1 << 16);
  int nv = g->n_values;
  unsigned char *live = NULL;
  rc_status st;
  p->t = rc__arena_zalloc(&p->meta, sizeof(rc_tensor) * (size_t)(nv + 1));
  p->grad = rc__arena_zalloc(&p->meta, sizeof(rc_tensor) * (size_t)(nv + 1));
  p->is_const = rc__arena_zalloc(&p->meta, (size_t)nv + 1);
  p->needs_grad = rc__arena_zalloc(&p->meta, (size_t)nv + 1);
  live = rc__calloc((size_t)nv + 1, 1);
  if (!p->t || !p->grad || !p->is_const || !p->needs_grad || !live) {
    st = rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
    goto fail;
  }
  for (int v = 0; v < nv; v++) {
    const rc_value *val = &g->values[v];
    if (val->kind == RC_VALUE_INITIALIZER) {
      p->t[v] = val->decl;
      int trainable = o->trainable && o->trainable[v];
      p->is_const[v] = !trainable;
      live[v] = (unsigned char)trainable;
    }
  }
  for (int i = 0; i < g->n_inputs; i++) live[g->inputs[i]] = 1;
  if ((st = check_inputs(p, inputs, e)) != RC_OK) goto fail;
  if ((st = infer_and_fold(p, o, live, e)) != RC_OK) goto fail;
  if (p->training && (st = mark_gradients(p, o, e)) != RC_OK) goto fail;
  if ((st = attach_patterns(p, o->patterns, e)) != RC_OK) goto fail;
  if ((st = find_chains(p, o, e)) != RC_OK) goto fail;
  if ((st = mark_inner_grads(p, o, e)) != RC_OK) goto fail;
  if ((st = layout_memory(p, o, e)) != RC_OK) goto fail;
  if ((st = build_gradient_views(p, e)) != RC_OK) goto fail;
  rc__free(live);
  *out = p;
  return RC_OK;
fail:
  rc__free(live);
  rc_plan_free(p);
  return st;
}

void rc_plan_free(rc_plan *p) {
  if (!p) return;
  for (int s = 0; s < p->n_steps; s++)
    if (p->steps[s].state.release) p->steps[s].state.release(p->steps[s].state.data);
  rc__free(p->block);
  rc__arena_free(&p->meta);
  rc__free(p);
}

rc_tensor *rc_plan_tensor(rc_plan *p, int value) {
  return value >= 0 && value < p->g->n_values ? &p->t[value] : NULL;
}

rc_tensor *rc_plan_grad(rc_plan *p, int value) {
  if (value < 0 || value >= p->g->n_values || !p->grad[value].data) return NULL;
  return &p->grad[value];
}

rc_status rc_plan_bind_grad(rc_plan *p, int value, float *buf, rc_err *e) {
  if (value < 0 || value >= p->g->n_values || !p->needs_grad[value])
    return rc__fail(e, RC_ERR_INVALID, "%s: value %d has no gradient in this plan", p->g->path, value);
  p->grad[value].data = buf;
  return RC_OK;
}

static const plan_step *step_of(const rc_plan *p, int node) {
  for (int s = 0; s < p->n_steps; s++)
    if (p->steps[s].node == node) return &p->steps[s];
  return NULL;
}

const rc__wpattern *rc__plan_step_pattern(const rc_plan *p, int node) {
  const plan_step *s = step_of(p, node);
  return s ? s->k.pattern : NULL;
}

int rc__plan_step_has_state(const rc_plan *p, int node) {
  const plan_step *s = step_of(p, node);
  return s && s->state.data != NULL;
}

int rc_plan_is_const(const rc_plan *p, int value) {
  return value >= 0 && value < p->g->n_values && p->is_const[value];
}

rc_status rc_plan_forward(rc_plan *p, rc_err *e) {
  const int fuse = p->n_chains && rc__conv_fuse();
  p->ran_fused = fuse;
  for (int s = 0; s < p->n_steps; s++) {
    rc_kernel *k = &p->steps[s].k;
    if (fuse && p->role[s] < 0) continue;
    rc_status st =
        fuse && p->role[s] > 0 ? rc__chain_forward(&p->chains[p->role[s] - 1], e) : k->node->def->forward(k, e);
    if (st != RC_OK) return rc__wrap(e, "%s", p->g->path);
  }
  return RC_OK;
}

void rc_plan_zero_grad(rc_plan *p) {
  if (p->grad_bytes) memset(p->grad_block, 0, p->grad_bytes);
}

rc_status rc_plan_backward(rc_plan *p, rc_err *e) {
  if (!p->training)
    return rc__fail(e, RC_ERR_INVALID, "%s: backward on a plan built without training", p->g->path);
  for (int s = p->n_steps - 1; s >= 0; s--) {
    for (int i = p->clear_start[s]; i < p->clear_start[s + 1]; i++) {
      const rc_tensor *gt = &p->grad[p->clear_value[i]];
      memset(gt->data, 0, rc_tensor_nbytes(gt));
    }
    if (p->ran_fused && p->role[s] < 0) continue;
    const int own = p->ran_fused && p->role[s] > 0 ? rc__chain_backward(&p->chains[p->role[s] - 1]) : 1;
    if (own && p->steps[s].wants_backward) p->steps[s].k.node->def->backward(&p->steps[s].k);
  }
  return RC_OK;
}

int rc__plan_absorbed_steps(const rc_plan *p) {
  int n = 0;
  for (int s = 0; s < p->n_steps; s++) n += p->role[s] < 0;
  return n;
}

size_t rc_plan_bytes(const rc_plan *p) { return p->block_bytes + p->meta.total; }

const rc_graph *rc_plan_graph(const rc_plan *p) { return p->g; }
