#define _POSIX_C_SOURCE 200809L /* clock_gettime, CLOCK_MONOTONIC under -std=c11 */

#include "train/distill.h"

#include <fnmatch.h>
#include <math.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

#include "core/alloc.h"
#include "core/file.h"
#include "core/log.h"
#include "data/augment.h"
#include "data/spill.h"
#include "ops/nm.h"
#include "ops/sparse.h"
#include "plan/count.h"
#include "plan/inspect.h"
#include "plan/load.h"
#include "plan/plan.h"
#include "train/batch_source.h"
#include "train/bn_stats.h"
#include "train/checkpoint.h"
#include "train/dist.h"
#include "train/dist_grads.h"
#include "train/dist_stats.h"
#include "train/distill_state.h"
#include "train/features.h"
#include "train/loss.h"
#include "train/measure.h"
#include "train/pairing.h"
#include "train/params.h"
#include "train/qat.h"
#include "train/select.h"

void rc_distill_config_defaults(rc_distill_config *c) {
  memset(c, 0, sizeof *c);
  c->epochs = 3;
  c->batch = 64;
  c->terms.weight[RC_TERM_KD] = 1;
  c->temperature = RC_KD_DEFAULT_TEMPERATURE;
  c->alpha = -1;
  rc_optim_defaults(&c->optim, RC_OPTIM_ADAMW);
  c->sched.kind = RC_SCHED_COSINE;
  c->sched.lr = c->optim.lr;
  c->sched.lr_min = -1;
  c->sched.warmup = -1;
  c->sched.gamma = 0.1f;
  c->clip = RC_CLIP_DEFAULT_MAX_NORM;
  c->seed = 1;
  c->bn = RC_BN_FROZEN;
  c->mask = RC_MASK_AUTO;
  c->max_rollbacks = 3;
}

void rc_distill_result_free(rc_distill_result *r) {
  rc__free(r->layers);
  rc__free(r->ranges);
  rc__free(r->epoch_loss);
  rc__free(r->epoch_val);
  rc__free(r->changed);
  rc__free(r->rules);
  memset(r, 0, sizeof *r);
}

static double now_s(void) {
  struct timespec ts;
  clock_gettime(CLOCK_MONOTONIC, &ts);
  return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}

/* ---- What trains ----------------------------------------------------------- */

static int matches_any(const char *name, const char *const *globs, int n) {
  for (int i = 0; i < n; i++)
    if (fnmatch(globs[i], name, 0) == 0) return 1;
  return 0;
}

/* Remember what the zeros of a trained weight mean; returns its store flags. */
static rc_status add_rule(run_state *st, int v, const rc_mask_choice *m, const rc_int_range *range, rc_err *e) {
  rc_distill_tensor_rule *grown = rc__realloc(st->rules, sizeof *grown * (size_t)(st->n_rules + 1));
  int *gv = grown ? rc__realloc(st->rule_value, sizeof *gv * (size_t)(st->n_rules + 1)) : NULL;
  if (grown) st->rules = grown;
  if (!gv) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  st->rule_value = gv;
  rc_distill_tensor_rule *r = &st->rules[st->n_rules];
  memset(r, 0, sizeof *r);
  const rc_graph *g = st->sg;
  /* A shadow is reported under its integer initializer's name. */
  int named = v;
  for (int i = 0; i < st->qat.n; i++)
    if (st->qat.sites[i].shadow == v) named = st->qat.sites[i].int_value;
  snprintf(r->name, sizeof r->name, "%s", g->values[named].name);
  r->mask = *m;
  if (range) {
    r->quantized = 1;
    r->range = *range;
  }
  st->rule_value[st->n_rules++] = v;
  return RC_OK;
}

static unsigned weight_flags(const rc_mask_choice *m) { return m->keep_zeros ? RC_PARAM_KEEP_ZEROS : 0; }

static rc_status add_trainable(run_state *st, int v, unsigned flags, rc_err *e) {
  for (int i = 0; i < st->n_tr; i++)
    if (st->tr[i].value == v) return RC_OK;
  trainable *grown = rc__realloc(st->tr, sizeof *grown * (size_t)(st->n_tr + 1));
  if (!grown) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  st->tr = grown;
  st->tr[st->n_tr++] = (trainable){v, flags, -1, NULL};
  return RC_OK;
}

static rc_status select_trainables(run_state *st, rc_err *e) {
  const rc_graph *g = st->sg;
  const rc_distill_config *c = st->c;
  rc_weight_info *w = NULL;
  int n_w = 0;
  RC_TRY(rc__weights_collect(g, &w, &n_w, e));
  rc_status s = RC_OK;
  for (int i = 0; i < n_w && s == RC_OK; i++) {
    const rc_value *val = &g->values[w[i].value];
    if (w[i].quantized || val->decl.dtype != RC_DTYPE_FLOAT) continue;
    if (matches_any(val->name, c->freeze_globs, c->n_freeze)) continue;
    rc_mask_choice m;
    rc__mask_choose(c->mask, NULL, val->name, &val->decl, 0, NULL, 1, 1, &m);
    unsigned flags = w[i].role == RC_ROLE_WEIGHT ? weight_flags(&m)
                     : w[i].role == RC_ROLE_NORM ? RC_PARAM_NORM
                                                 : RC_PARAM_NO_DECAY;
    if (w[i].role == RC_ROLE_WEIGHT) s = add_rule(st, w[i].value, &m, NULL, e);
    if (s == RC_OK) s = add_trainable(st, w[i].value, flags, e);
  }
  rc__free(w);
  RC_TRY(s);
  /* Quantized weights train through their float shadows (or, for float
   * weights feeding QuantizeLinear, directly), on fixed grids. */
  for (int i = 0; i < st->qat.n; i++) {
    const rc_qat_site *q = &st->qat.sites[i];
    int file_value = q->int_value >= 0 ? q->int_value : q->float_weight;
    int v = q->int_value >= 0 ? q->shadow : q->float_weight;
    if (v < 0 || matches_any(g->values[file_value].name, c->freeze_globs, c->n_freeze)) continue;
    if (!q->is_bias) RC_TRY(add_rule(st, v, &q->mask, q->int_value >= 0 ? &q->range : NULL, e));
    RC_TRY(add_trainable(st, v, q->is_bias ? RC_PARAM_NO_DECAY : weight_flags(&q->mask), e));
  }
  /* --train adds float initializers beyond the default set. */
  for (int v = 0; v < g->n_values && c->n_train; v++) {
    const rc_value *val = &g->values[v];
    if (val->kind != RC_VALUE_INITIALIZER || val->decl.dtype != RC_DTYPE_FLOAT) continue;
    if (!matches_any(val->name, c->train_globs, c->n_train) ||
        matches_any(val->name, c->freeze_globs, c->n_freeze))
      continue;
    rc_mask_choice m;
    rc__mask_choose(c->mask, NULL, val->name, &val->decl, 0, NULL, 1, 1, &m);
    RC_TRY(add_trainable(st, v, weight_flags(&m), e));
  }
  if (!st->n_tr)
    return rc__fail(e, RC_ERR_INVALID, "%s: nothing to train (no float weights of Conv, ConvTranspose, Gemm, "
                    "MatMul, PRelu, normalisation layers or Add/Mul parameters after the train and freeze patterns)",
                    g->path);
  return RC_OK;
}

static int is_bn(const rc_node *n) { return !strcmp(n->op_type, "BatchNormalization"); }

/* BatchNormalization running statistics join the store (never decayed, no
 * gradient) when they change, so snapshots and the best state include them. */
static rc_status collect_bn(run_state *st, rc_err *e) {
  const rc_graph *g = st->sg;
  st->bn_nodes = rc__calloc((size_t)g->n_nodes + 1, sizeof(int));
  if (!st->bn_nodes) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  for (int i = 0; i < g->n_nodes; i++) {
    const rc_node *n = &g->nodes[i];
    if (!is_bn(n) || n->n_in < 5) continue;
    st->bn_nodes[st->n_bn++] = i;
    if (st->c->bn == RC_BN_FROZEN) continue;
    for (int k = 3; k <= 4; k++) {
      int v = n->in[k];
      if (v < 0 || g->values[v].kind != RC_VALUE_INITIALIZER || g->values[v].decl.dtype != RC_DTYPE_FLOAT)
        return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: node '%s': running statistics must be float initializers "
                        "to re-estimate them", g->path, n->label);
      RC_TRY(add_trainable(st, v, RC_PARAM_NO_DECAY, e));
    }
  }
  return RC_OK;
}

/* Feature terms: pairs, projectors (store entries), tensors to keep. */
static rc_status setup_features(run_state *st, const rc_tensor *data, rc_err *e) {
  const rc_distill_config *c = st->c;
  int any = 0;
  for (int t = RC_TERM_HINT; t < RC_TERM_COUNT; t++)
    if (c->terms.weight[t] > 0) any = 1;
  if (!any) return RC_OK;
  st->tkeep = rc__calloc((size_t)st->teacher->graph.n_values + 1, 1);
  st->skeep = rc__calloc((size_t)st->sg->n_values + 1, 1);
  if (!st->tkeep || !st->skeep) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  rc_tensor shapes[RC_DATASET_MAX_INPUTS];
  rc__input_shapes(st->sg, data, 1, shapes);
  return rc__features_init(&st->feat, &c->terms, &st->teacher->graph, st->sg, shapes, c->pairs, c->pair_weights,
                           c->n_pairs, st->ps, st->tkeep, st->skeep, e);
}

static rc_status build_store(run_state *st, const rc_tensor *data, rc_err *e) {
  rc_graph *g = st->sg;
  RC_TRY(rc_params_init(&st->ps, e));
  for (int i = 0; i < st->n_tr; i++) {
    rc_value *val = &g->values[st->tr[i].value];
    RC_TRY(rc_params_add(st->ps, &st->tr[i].entry, val->name, rc_tensor_numel(&val->decl), val->decl.data,
                         st->tr[i].flags, e));
  }
  RC_TRY(setup_features(st, data, e));
  RC_TRY(rc_params_finalize(st->ps, rc_optim_moments(&st->c->optim), e));
  RC_TRY(rc_params_build_masks(st->ps, e));
  if (st->feat) RC_TRY(rc__features_bind(st->feat, st->ps, st->c->seed, e));
  /* From here on the graph reads its initializers from the store. */
  for (int i = 0; i < st->n_tr; i++) {
    rc_value *val = &g->values[st->tr[i].value];
    st->tr[i].orig = val->decl.data;
    val->decl.data = rc_params_value(st->ps, st->tr[i].entry);
  }
  return RC_OK;
}

/* Put the graph's own buffers back, holding the store's current values. */
static void restore_graph_buffers(run_state *st) {
  if (!st->ps) return;
  for (int i = 0; i < st->n_tr; i++) {
    rc_value *val = &st->sg->values[st->tr[i].value];
    if (!st->tr[i].orig) continue;
    memcpy(st->tr[i].orig, rc_params_value(st->ps, st->tr[i].entry), sizeof(float) * (size_t)rc_tensor_numel(&val->decl));
    val->decl.data = st->tr[i].orig;
    st->tr[i].orig = NULL;
  }
}

/* ---- Plans ------------------------------------------------------------------ */

static rc_status logits_width(const rc_plan *p, const rc_graph *g, int64_t b, int64_t *k, rc_err *e) {
  const rc_tensor *t = rc_plan_tensor((rc_plan *)p, g->outputs[0]);
  if (t->dtype != RC_DTYPE_FLOAT || t->rank != 2 || t->dims[0] != b)
    return rc__fail(e, RC_ERR_SHAPE, "%s: distillation needs a float (N, classes) first output; '%s' is not",
                    g->path, g->values[g->outputs[0]].name);
  *k = t->dims[1];
  return RC_OK;
}

/* Inputs of the teacher in the student's order (names match, checked). */
static void teacher_order(const rc_graph *t, const rc_graph *s, const rc_tensor *in, rc_tensor *out) {
  for (int i = 0; i < t->n_inputs; i++) {
    int j = rc__graph_find_in(s, s->inputs, s->n_inputs, t->values[t->inputs[i]].name);
    out[i] = in[j < 0 ? i : j];
  }
}

/* Pruned weights' kept positions, for the student's plans, whose kernels
 * may then run sparse (ops/sparse.h): only the masks tell a frozen zero
 * from a trainable weight that happens to be zero. Built once for the run:
 * the training, evaluation and measuring plans share them. */
static rc_status build_patterns(run_state *st, rc_err *e) {
  const rc_graph *sg = st->sg;
  rc__arena_init(&st->patterns_mem, 1 << 16);
  st->patterns = rc__calloc((size_t)sg->n_values + 1, sizeof *st->patterns);
  if (!st->patterns) return rc__fail(e, RC_ERR_NOMEM, "out of memory for weight patterns");
  for (int i = 0; i < st->n_tr; i++) {
    const int v = st->tr[i].value;
    const uint8_t *mask = rc_params_entry(st->ps, st->tr[i].entry)->mask;
    const rc_tensor *t = &sg->values[v].decl;
    if (!mask || !st->trainable_mask[v] || t->rank < 2 || t->dtype != RC_DTYPE_FLOAT || !t->dims[0]) continue;
    rc__wpattern *pat = rc__arena_zalloc(&st->patterns_mem, sizeof *pat);
    if (!pat) return rc__fail(e, RC_ERR_NOMEM, "out of memory for a weight pattern");
    if (rc__wpattern_build(pat, &st->patterns_mem, mask, t->dims[0], rc_tensor_numel(t) / t->dims[0], e) != RC_OK ||
        rc__nm_attach(pat, &st->patterns_mem, mask, rc_tensor_numel(t) / (t->dims[0] * t->dims[1]), e) != RC_OK)
      return rc__wrap(e, "%s: '%s'", sg->path, sg->values[v].name);
    st->patterns[v] = pat;
  }
  return RC_OK;
}

/* What train/measure.c needs of the run: plans at the run's batch size over
 * the validation samples, with the student as rewritten for training. */
static rc_status measure_setup(run_state *st, rc_measure_setup *m, rc_tensor *shapes, rc_tensor *tin,
                               unsigned char **live, rc_err *e) {
  *live = rc__calloc((size_t)st->sg->n_values + 1, 1);
  if (!*live) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  for (int i = 0; i < st->n_tr; i++) (*live)[st->tr[i].value] = 1;
  rc__input_shapes(st->sg, st->val.inputs, st->batch, shapes);
  teacher_order(&st->teacher->graph, st->sg, shapes, tin);
  *m = (rc_measure_setup){&st->teacher->graph,
                          st->sg,
                          shapes,
                          tin,
                          &st->val,
                          st->batch,
                          *live,
                          &st->qat,
                          st->c->dist,
                          st->patterns,
                          st->measure_shared ? st->teacher_plan : NULL,
                          st->measure_shared ? st->eval_plan : NULL};
  return RC_OK;
}

/* The layer table's pairs (r->layers), and what the run's inference plans
 * keep so that its passes run through them: the teacher's and the student's
 * values it reads (NULL when its shapes are not the plans', so it builds
 * its own). The caller frees *tkeep and *skeep. */
static rc_status measure_pairs(run_state *st, const rc_tensor *shapes, const rc_tensor *tin, rc_distill_result *r,
                               rc_pairing *pg, unsigned char **tkeep, unsigned char **skeep, rc_err *e) {
  rc_measure_setup m;
  rc_tensor ms[RC_DATASET_MAX_INPUTS], mt[RC_DATASET_MAX_INPUTS];
  unsigned char *live = NULL;
  *tkeep = *skeep = NULL;
  rc_status s = measure_setup(st, &m, ms, mt, &live, e);
  if (s == RC_OK) s = rc__measure_prepare(&m, pg, r, e);
  int same = 1;
  for (int i = 0; i < st->sg->n_inputs; i++) same &= rc_shape_equal(&ms[i], &shapes[i]);
  for (int i = 0; i < st->teacher->graph.n_inputs; i++) same &= rc_shape_equal(&mt[i], &tin[i]);
  if (s == RC_OK && same && (pg->n || r->n_ranges)) {
    *tkeep = rc__calloc((size_t)st->teacher->graph.n_values + 1, 1);
    *skeep = rc__calloc((size_t)st->sg->n_values + 1, 1);
    if (!*tkeep || !*skeep)
      s = rc__fail(e, RC_ERR_NOMEM, "out of memory");
    else
      rc__measure_keep(&m, pg, *tkeep, *skeep);
  }
  rc__free(live);
  return s;
}

static rc_status build_plans(run_state *st, const rc_tensor *data, rc_distill_result *r, rc_pairing *pg,
                             rc_err *e) {
  const rc_graph *tg = &st->teacher->graph, *sg = st->sg;
  rc_tensor shapes[RC_DATASET_MAX_INPUTS], tin[RC_DATASET_MAX_INPUTS];
  rc__input_shapes(sg, data, st->batch, shapes);
  st->trainable_mask = rc__calloc((size_t)sg->n_values + 1, 1);
  unsigned char *live = rc__calloc((size_t)sg->n_values + 1, 1);
  if (!st->trainable_mask || !live) {
    rc__free(live);
    return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  }
  /* Everything in the store changes during the run, so no plan may fold it
   * into a constant; running statistics change but take no gradient. */
  for (int i = 0; i < st->n_tr; i++) st->trainable_mask[st->tr[i].value] = live[st->tr[i].value] = 1;
  for (int b = 0; b < st->n_bn; b++) {
    const rc_node *n = &sg->nodes[st->bn_nodes[b]];
    for (int k = 3; k <= 4 && k < n->n_in; k++)
      if (n->in[k] >= 0) st->trainable_mask[n->in[k]] = 0;
  }
  teacher_order(tg, sg, shapes, tin);
  unsigned char *tkeep = NULL, *skeep = NULL;
  rc_status s = build_patterns(st, e);
  if (s == RC_OK) s = measure_pairs(st, shapes, tin, r, pg, &tkeep, &skeep, e);
  rc_plan_opts eval_opts = {
      .training = 0, .trainable = live, .keep = skeep, .bn_batch_stats = 0, .patterns = st->patterns};
  rc_plan_opts teacher_opts = {.keep = tkeep};
  if (s == RC_OK) s = rc_plan_init(&st->eval_plan, sg, shapes, &eval_opts, e);
  if (s == RC_OK) s = rc_plan_init(&st->teacher_plan, tg, tin, &teacher_opts, e);
  st->measure_shared = s == RC_OK && skeep;
  rc__free(live);
  rc__free(tkeep);
  rc__free(skeep);
  RC_TRY(s);
  rc_plan_opts train_opts = {.training = 1,
                             .trainable = st->trainable_mask,
                             .keep = st->skeep,
                             .bn_batch_stats = st->c->bn == RC_BN_TRAIN,
                             .reduce = rc__dist_stats_hook(&st->stats),
                             .patterns = st->patterns};
  /* The step's plans take this rank's part of the global batch. */
  rc_tensor part[RC_DATASET_MAX_INPUTS], tpart[RC_DATASET_MAX_INPUTS];
  rc__input_shapes(sg, data, st->local, part);
  teacher_order(tg, sg, part, tpart);
  RC_TRY(rc_plan_init(&st->train_plan, sg, part, &train_opts, e));
  if ((st->feat && rc_loss_spec_needs_features(&st->c->terms)) || st->c->n_output_losses) {
    rc_plan_opts keep = {.training = 0,
                         .trainable = NULL,
                         .keep = st->tkeep,
                         .bn_batch_stats = 0,
                         .reduce = rc__dist_stats_hook(&st->stats)};
    RC_TRY(rc_plan_init(&st->teacher_step, tg, tpart, &keep, e));
  }
  int64_t kt = 0;
  if (st->c->n_output_losses)
    RC_TRY(rc__outputs_create(&st->outs, st->c->output_losses, st->c->n_output_losses, st->c->temperature,
                              st->teacher_step, st->train_plan, st->c->label_output, e));
  else
    RC_TRY(logits_width(st->eval_plan, sg, st->batch, &st->k, e));
  if (!st->outs) RC_TRY(logits_width(st->teacher_plan, tg, st->batch, &kt, e));
  if (kt != st->k)
    return rc__fail(e, RC_ERR_SHAPE, "teacher %s gives %lld classes, student %s %lld", tg->path, (long long)kt,
                    sg->path, (long long)st->k);
  for (int i = 0; i < st->n_tr; i++) {
    int v = st->tr[i].value;
    if (!st->trainable_mask[v]) continue;
    if (!rc_plan_grad(st->train_plan, v)) continue; /* feeds no output: stays as it is */
    RC_TRY(rc_plan_bind_grad(st->train_plan, v, rc_params_grad(st->ps, st->tr[i].entry), e));
  }
  return RC_OK;
}

/* This rank's share of an unshuffled view (its order is the identity, so
 * the first part.n positions of order serve the slice), in whole batches
 * so that every row is computed as one process computes it: the results,
 * and checkpoints' fingerprints of them, do not depend on the ranks. */
static rc_dataset rank_slice(const run_state *st, const rc_dataset *d, int64_t *lo) {
  int64_t hi;
  rc_dist_share_blocks(d->n, st->batch, rc_dist_rank(st->c->dist), rc_dist_size(st->c->dist), lo, &hi);
  rc_dataset part = *d;
  part.index = d->index + *lo;
  part.n = hi - *lo;
  return part;
}

/* Outputs of plan p over a view, in the view's order: each rank runs its
 * share, then every rank receives all rows. */
static rc_status run_shared(run_state *st, rc_plan *p, const rc_dataset *d, const int *outputs, float *out, rc_err *e) {
  int64_t lo;
  rc_dataset part = rank_slice(st, d, &lo);
  void *outs[1] = {out + lo * st->k};
  if (part.n > 0) RC_TRY(rc__run_dataset(p, &part, outputs, 1, outs, e));
  return rc_dist_gather_rows(st->c->dist, out, d->n, st->batch, st->k, e);
}

/* Teacher logits for every sample of a dataset, in the dataset's own order. */
static rc_status teacher_pass(run_state *st, const rc_dataset *d, float *out, rc_err *e) {
  const rc_graph *tg = &st->teacher->graph, *sg = st->sg;
  /* The dataset's inputs are in the student's order; the teacher's plan may
   * order them differently, so gather into the student's order first. */
  rc_dataset td = *d;
  for (int i = 0; i < tg->n_inputs; i++) {
    int j = rc__graph_find_in(sg, sg->inputs, sg->n_inputs, tg->values[tg->inputs[i]].name);
    rc_dataset_take_input(&td, i, d, j);
  }
  return run_shared(st, st->teacher_plan, &td, tg->outputs, out, e);
}

/* ---- Data ----------------------------------------------------------------- */

/* A view over the training (or validation) arrays, converting per batch where asked. */
static rc_status data_view(rc_dataset *ds, const rc_distill_data *d, int val, const int64_t *index, int64_t n,
                           rc_err *e) {
  RC_TRY(rc_dataset_init(ds, val ? d->val_inputs : d->inputs, d->n_inputs, NULL, index, n, e));
  const rc_array *src = val ? d->val_sources : d->sources;
  for (int i = 0; d->norms && i < d->n_inputs; i++)
    if (d->norms[i].scale != 0) rc_dataset_convert(ds, i, &d->norms[i], src ? &src[i] : NULL);
  return RC_OK;
}

static rc_status setup_data(run_state *st, const rc_distill_data *d, rc_err *e) {
  int64_t n = d->inputs[0].dims[0];
  if (d->val_inputs) {
    RC_TRY(data_view(&st->train, d, 0, NULL, 0, e));
    RC_TRY(data_view(&st->val, d, 1, NULL, 0, e));
    st->own_val = 1;
    st->val_labels = d->val_labels;
    return RC_OK;
  }
  if (d->val_split <= 0 || d->val_split >= 1)
    return rc__fail(e, RC_ERR_INVALID, "the validation split must lie strictly between 0 and 1");
  RC_TRY(rc_data_split_init(&st->split, n, d->val_split, st->c->seed, e));
  if (st->split.n_train < 1 || st->split.n_val < 1)
    return rc__fail(e, RC_ERR_INVALID, "%lld samples are too few to hold out a validation slice", (long long)n);
  RC_TRY(data_view(&st->train, d, 0, st->split.train, st->split.n_train, e));
  RC_TRY(data_view(&st->val, d, 0, st->split.val, st->split.n_val, e));
  return RC_OK;
}

/* Labels of the validation samples, in the validation view's order. */
static rc_status val_labels_of(run_state *st, const rc_distill_data *d, int32_t **owned, rc_err *e) {
  *owned = NULL;
  if (st->own_val || !d->labels) return RC_OK;
  int32_t *l = rc__malloc(sizeof(int32_t) * (size_t)st->val.n + 1);
  if (!l) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  for (int64_t i = 0; i < st->val.n; i++) l[i] = d->labels[st->val.index[i]];
  *owned = l;
  st->val_labels = l;
  return RC_OK;
}

static rc_status validate(run_state *st, rc_metrics *m, rc_err *e) {
  if (st->outs)
    return rc__outputs_validate(st->outs, st->teacher_step, st->eval_plan, &st->val, st->val_side, st->val.index, m, e);
  RC_TRY(run_shared(st, st->eval_plan, &st->val, st->sg->outputs, st->val_logits, e));
  return rc__metrics_compute(m, st->val_logits, st->val_labels, st->teacher_val_logits, st->val.n, st->k, e);
}

/* The weight of the distillation term, as training uses it; the best state
 * is chosen by the same mix on validation (train/select.h). */
static double select_alpha(const run_state *st) {
  int dense = st->outs && st->val_side && st->val_side->labels;
  return st->c->alpha >= 0 ? st->c->alpha : st->val_labels || dense ? 0.9 : 1.0;
}

/* ---- One step --------------------------------------------------------------- */

static rc_status loss_and_seed(run_state *st, const step_buffers *sb, const int32_t *labels, double *loss,
                               rc_err *e) {
  const rc_distill_config *c = st->c;
  const rc_graph *g = st->sg;
  const float *s = rc_plan_tensor(st->train_plan, g->outputs[0])->data;
  rc_tensor *gt = rc_plan_grad(st->train_plan, g->outputs[0]);
  if (!gt) return rc__fail(e, RC_ERR_INVALID, "%s: no trainable tensor reaches output '%s'", g->path,
                           g->values[g->outputs[0]].name);
  float *grad = gt->data;
  float alpha = c->alpha >= 0 ? c->alpha : labels ? 0.9f : 1.0f;
  double dl = 0, ce = 0;
  float wkd = c->terms.weight[RC_TERM_KD], wmse = c->terms.weight[RC_TERM_LOGIT_MSE];
  if (wkd > 0)
    RC_TRY(rc_loss_kd(&dl, NULL, grad, alpha * wkd, s, sb->teacher, st->local, st->k, c->temperature, e));
  else if (wmse > 0)
    RC_TRY(rc_loss_logit_mse(&dl, NULL, grad, alpha * wmse, s, sb->teacher, st->local, st->k, e));
  dl *= wkd > 0 ? wkd : wmse;
  if (labels && alpha < 1 && sb->mix.kind != RC_MIX_NONE) {
    RC_TRY(rc__distill_mixed_cross_entropy(st, sb, grad, 1 - alpha, s, labels, &ce, e));
  } else if (labels && alpha < 1) {
    RC_TRY(rc_loss_cross_entropy(&ce, NULL, grad, 1 - alpha, s, labels, st->local, st->k, e));
  }
  *loss = alpha * dl + (labels && alpha < 1 ? (1 - alpha) * ce : 0);
  return RC_OK;
}

/* Per-output terms: the teacher runs on the same batch, side data is taken
 * by sample number. */
static rc_status outputs_loss(run_state *st, const step_buffers *sb, int64_t b, double *loss, rc_err *e) {
  for (int64_t j = 0; j < st->batch; j++) sb->samples[j] = st->train.index[st->train.order[b * st->batch + j]];
  RC_TRY(rc__outputs_copy_inputs(st->teacher_step, st->train_plan, e));
  RC_TRY(rc_plan_forward(st->teacher_step, e));
  float alpha = st->c->alpha >= 0 ? st->c->alpha : 0.9f;
  return rc__outputs_step(st->outs, st->teacher_step, st->train_plan, st->train_side, sb->samples, st->batch, alpha,
                          loss, e);
}

/* ---- The run ------------------------------------------------------------------ */

static void notify(const rc_distill_config *c, rc_distill_progress *p) {
  if (c->progress) c->progress(c->user, p);
}

typedef struct loop_ctx {
  run_state *st;
  rc_distill_result *r;
  rc_sched sched;
  int64_t spe, total, epochs;
  int best_slot, good_slot;
  uint64_t fingerprint;
  int stop_all;              /* a rank was asked to stop (summed with the step) */
} loop_ctx;

/* Per-output terms, by value. */
static uint64_t outputs_fingerprint(const run_state *st, uint64_t h) {
  const rc_distill_config *c = st->c;
  for (int i = 0; i < c->n_output_losses; i++) {
    const rc_output_loss *o = &c->output_losses[i];
    int64_t ints[] = {o->term, o->axis, o->bins, o->n_class_weights};
    float reals[] = {o->weight, o->temperature, o->beta, o->margin};
    h = rc__ckpt_fp_bytes(h, o->output, strlen(o->output));
    h = rc__ckpt_fp_i64(h, ints, sizeof ints / sizeof ints[0]);
    h = rc__ckpt_fp_f32(h, reals, sizeof reals / sizeof reals[0]);
    h = rc__ckpt_fp_f32(h, o->class_weights, (size_t)o->n_class_weights);
  }
  return h;
}

/* The training arrays by their size and a sample of their bytes, with their
 * normalisation. Hashing every byte made a short run on a large mapped .npy
 * read the whole file before its first step (the lazy teacher cache reads
 * only the rows it draws), so an array above FP_WHOLE is hashed by its
 * first and last FP_EDGE bytes and FP_BLOCKS blocks of FP_BLOCK bytes spread
 * evenly between them: enough to tell another file from this one, not every
 * edit inside it. A mapped array's pages read here are dropped again. */
#define FP_WHOLE ((size_t)8 << 20)
#define FP_EDGE ((size_t)1 << 20)
#define FP_BLOCKS 64
#define FP_BLOCK ((size_t)64 << 10)
static uint64_t array_fingerprint(const unsigned char *p, size_t n, const rc_array *release, uint64_t h) {
  int64_t size[] = {(int64_t)n};
  h = rc__ckpt_fp_i64(h, size, 1);
  if (n <= FP_WHOLE) return rc__ckpt_fp_bytes(h, p, n);
  size_t inner = n - 2 * FP_EDGE - FP_BLOCK; /* where the blocks may start, past the first edge */
  h = rc__ckpt_fp_bytes(h, p, FP_EDGE);
  for (size_t b = 0; b < FP_BLOCKS; b++)
    h = rc__ckpt_fp_bytes(h, p + FP_EDGE + inner / (FP_BLOCKS - 1) * b, FP_BLOCK);
  h = rc__ckpt_fp_bytes(h, p + n - FP_EDGE, FP_EDGE);
  rc_array_release_pages(release);
  return h;
}

static uint64_t data_fingerprint(const run_state *st, uint64_t h) {
  const rc_dataset *d = &st->train;
  for (int i = 0; i < d->n_inputs; i++) {
    /* Images decoded per batch have no array to hash: their count is
     * hashed with the pool's size in run_fingerprint. */
    const unsigned char *p = d->inputs[i].data;
    if (p) h = array_fingerprint(p, rc_tensor_nbytes(&d->inputs[i]), d->release[i], h);
    const rc_data_norm *nm = &d->norm[i];
    float scale[] = {d->to_float[i] ? nm->scale : 0};
    h = rc__ckpt_fp_f32(h, scale, 1);
    if (d->to_float[i] && nm->mean) h = rc__ckpt_fp_f32(h, nm->mean, (size_t)nm->n_mean);
    if (d->to_float[i] && nm->std) h = rc__ckpt_fp_f32(h, nm->std, (size_t)nm->n_std);
  }
  return h;
}

/* The teacher's initializers, the training data and, when the logit terms
 * are matched, the teacher's outputs on the validation samples stand for
 * the teacher outputs a run trains on (computed lazily, so not at hand
 * when the run starts). */
static uint64_t teacher_fingerprint(const run_state *st, uint64_t h) {
  const rc_graph *tg = &st->teacher->graph;
  for (int v = 0; v < tg->n_values; v++)
    if (tg->values[v].kind == RC_VALUE_INITIALIZER && tg->values[v].decl.data)
      h = rc__ckpt_fp_bytes(h, tg->values[v].decl.data, rc_tensor_nbytes(&tg->values[v].decl));
  if (st->teacher_val_logits) h = rc__ckpt_fp_f32(h, st->teacher_val_logits, (size_t)(st->val.n * st->k));
  return data_fingerprint(st, h);
}

/* Identifies a run: the student's starting values, the teacher and the data
 * (teacher_fingerprint), and every setting that shapes the trajectory,
 * hashed by value. A checkpoint from another run is refused. */
static uint64_t run_fingerprint(const loop_ctx *lc) {
  const run_state *st = lc->st;
  const rc_distill_config *c = st->c;
  uint64_t h = RC_CKPT_FP_INIT;
  h = rc__ckpt_fp_f32(h, rc_params_block(st->ps, RC_BLOCK_VALUE, -1), rc_params_total(st->ps));
  h = teacher_fingerprint(st, h);
  int64_t ints[] = {(int64_t)c->seed, st->batch, lc->total, lc->spe, c->bn, st->train.n, st->val.n,
                    c->optim.kind, c->optim.nesterov, c->optim.decay_norm, c->sched.kind, lc->sched.warmup,
                    lc->sched.step_size, c->mask};
  double reals[] = {c->temperature, c->alpha, c->optim.lr, c->optim.weight_decay, c->optim.momentum,
                    c->optim.beta1, c->optim.beta2, c->optim.eps, lc->sched.lr_min, lc->sched.gamma, c->clip};
  h = rc__ckpt_fp_i64(h, ints, sizeof ints / sizeof ints[0]);
  h = rc__ckpt_fp_f32(h, c->terms.weight, sizeof c->terms.weight / sizeof c->terms.weight[0]);
  if (st->outs) h = outputs_fingerprint(st, h);
  if (st->augmenting) {
    char aug[RC_AUGMENT_TEXT_MAX];
    rc__augment_describe(&st->aug, aug, sizeof aug);
    h = rc__ckpt_fp_bytes(h, aug, strlen(aug));
  }
  return rc__ckpt_fp_f64(h, reals, sizeof reals / sizeof reals[0]);
}

static rc_status checkpoint_write(const loop_ctx *lc, const loop_state *ls, rc_err *e) {
  if (rc_dist_rank(lc->st->c->dist) != 0) return RC_OK; /* the ranks' states are equal: one writes */
  rc_ckpt_run run = {lc->fingerprint, lc->st->c->seed, lc->epochs};
  return rc__ckpt_write(lc->st->c->checkpoint_path, &run, ls, lc->r->epoch_loss, lc->r->epoch_val, lc->st->ps, e);
}

static rc_status checkpoint_read(const loop_ctx *lc, loop_state *ls, rc_err *e) {
  rc_ckpt_run run = {lc->fingerprint, lc->st->c->seed, lc->epochs};
  return rc__ckpt_read(lc->st->c->resume_path, &run, ls, lc->r->epoch_loss, lc->r->epoch_val, lc->st->ps, e);
}

static rc_status setup_schedule(loop_ctx *lc, rc_err *e) {
  const rc_distill_config *c = lc->st->c;
  rc_sched *sched = &lc->sched;
  rc_sched_defaults(sched, c->optim.lr, lc->total);
  sched->kind = c->sched.kind;
  if (c->sched.warmup >= 0) sched->warmup = c->sched.warmup;
  if (c->sched.lr_min >= 0) sched->lr_min = c->sched.lr_min;
  if (c->sched.step_size > 0)
    sched->step_size = c->sched.step_size;
  else if (sched->kind == RC_SCHED_STEP)
    sched->step_size = lc->spe > 0 ? lc->spe : 1;
  sched->gamma = c->sched.gamma;
  return rc_sched_check(sched, e);
}

/* Under MPI: the global batch's mean gradient and loss from the ranks'
 * parts, and whether any rank was asked to stop. */
static rc_status sum_over_ranks(loop_ctx *lc, double *loss, rc_err *e) {
  run_state *st = lc->st;
  if (rc_dist_size(st->c->dist) < 2) return RC_OK;
  double extra[2] = {*loss, st->c->stop && *st->c->stop ? 1.0 : 0.0};
  RC_TRY(rc__grad_sync_run(&st->sync, st->c->dist, st->ps, (float)st->local / (float)st->batch, extra, e));
  *loss = extra[0];
  lc->stop_all = extra[1] > 0;
  return RC_OK;
}

static int stop_asked(const loop_ctx *lc) {
  const rc_distill_config *c = lc->st->c;
  return rc_dist_size(c->dist) > 1 ? lc->stop_all : c->stop && *c->stop;
}

/* Every RC_DIST_CHECK_EVERY steps and at the end, the ranks' parameters
 * must still be equal: a difference means a rank computed something else. */
#define RC_DIST_CHECK_EVERY 50
static rc_status check_ranks_agree(const run_state *st, int64_t step, rc_err *e) {
  if (rc_dist_size(st->c->dist) < 2) return RC_OK;
  char what[64];
  snprintf(what, sizeof what, "parameters after step %lld", (long long)step);
  return rc_dist_check_equal(st->c->dist, rc__params_checksum(st->ps), what, e);
}

/* One optimizer step on batch b of the current epoch's order. Returns the
 * loss through *loss; a non-finite loss or gradient is reported by *bad. */
static rc_status train_step(loop_ctx *lc, const loop_state *ls, step_buffers *sb, double *loss, int *bad,
                            rc_err *e) {
  run_state *st = lc->st;
  int64_t count;
  RC_TRY(rc__batch_source_next(&sb->source, ls->batch, sb->in, sb->labels, &count, e));
  if (st->augmenting) RC_TRY(rc__distill_augment_batch(st, ls->batch, ls->step, sb, e));
  RC_TRY(rc__distill_teacher_rows(st, sb, ls->batch, lc->spe, e));
  rc_params_zero_grad(st->ps);
  rc_plan_zero_grad(st->train_plan);
  RC_TRY(rc_plan_forward(st->train_plan, e));
  if (st->outs)
    RC_TRY(outputs_loss(st, sb, ls->batch, loss, e));
  else
    RC_TRY(loss_and_seed(st, sb, sb->labels, loss, e));
  if (st->feat) {
    if (st->teacher_step) {
      const rc_graph *tg = &st->teacher->graph, *sg = st->sg;
      for (int i = 0; i < tg->n_inputs; i++) {
        int j = rc__graph_find_in(sg, sg->inputs, sg->n_inputs, tg->values[tg->inputs[i]].name);
        memcpy(rc_plan_tensor(st->teacher_step, tg->inputs[i])->data, sb->in[j],
               rc_tensor_nbytes(rc_plan_tensor(st->teacher_step, tg->inputs[i])));
      }
      RC_TRY(rc_plan_forward(st->teacher_step, e));
      if (!st->projectors_started && rc_params_steps(st->ps) == 0) {
        int fitted;
        RC_TRY(rc__features_fit_projectors(st->feat, st->teacher_step, st->train_plan, st->ps, &fitted, e));
        if (fitted) rc__log(&st->c->log, RC_LOG_INFO, "projectors started from a least-squares fit on the first batch");
        /* Each rank fitted on its own rows: all take rank 0's projectors. */
        RC_TRY(rc_dist_bcast(st->c->dist, rc_params_block(st->ps, RC_BLOCK_VALUE, -1),
                             sizeof(float) * rc_params_total(st->ps), e));
      }
      st->projectors_started = 1;
    }
    double fl = 0;
    RC_TRY(rc__features_step(st->feat, st->teacher_step, st->train_plan, st->ps, sb->teacher, &fl, e));
    *loss += fl;
  }
  RC_TRY(rc_plan_backward(st->train_plan, e));
  RC_TRY(rc__dist_stats_check(&st->stats, e));
  RC_TRY(sum_over_ranks(lc, loss, e));
  double norm = rc_clip_grad_norm(st->ps, st->c->clip);
  *bad = !isfinite(*loss) || !isfinite(norm);
  if (*bad) return RC_OK;
  if (st->c->bn == RC_BN_TRAIN)
    RC_TRY(rc__bn_update_running(st->sg, st->train_plan, st->bn_nodes, st->n_bn, sb->bn_scratch, st->c->dist, e));
  float lr = (float)(rc_sched_lr(&lc->sched, rc_params_steps(st->ps) + 1) * ls->lr_scale);
  sb->lr = lr;
  return rc_optim_step(st->ps, &st->c->optim, lr, e);
}

static rc_status end_epoch(loop_ctx *lc, loop_state *ls, rc_distill_progress *pg, rc_err *e) {
  run_state *st = lc->st;
  rc_metrics m;
  RC_TRY(validate(st, &m, e));
  lc->r->epoch_loss[ls->n_epochs] = ls->ep_steps ? ls->ep_loss / (double)ls->ep_steps : NAN;
  lc->r->epoch_val[ls->n_epochs++] = m;
  pg->event = RC_DISTILL_EPOCH;
  pg->epoch = ls->epoch + 1;
  pg->val = m;
  pg->is_best = rc__select_better(&m, &ls->best, select_alpha(st));
  if (pg->is_best) {
    ls->best = m;
    ls->best_epoch = ls->epoch + 1;
    RC_TRY(rc_params_save(st->ps, lc->best_slot, e));
  }
  notify(st->c, pg);
  ls->epoch++;
  ls->batch = 0;
  ls->ep_loss = 0;
  ls->ep_steps = 0;
  return RC_OK;
}

/* One point per window of ceil(total / RC_DISTILL_TRACE_MAX) good steps:
 * enough to see the curve, a fixed size whatever the run's length. */
static void trace_loss(loop_state *ls, double loss, int64_t total) {
  int64_t window = (total + RC_DISTILL_TRACE_MAX - 1) / RC_DISTILL_TRACE_MAX;
  ls->window_loss += loss;
  ls->window_steps++;
  if ((ls->window_steps < window && ls->step < total) || ls->n_trace >= RC_DISTILL_TRACE_MAX) return;
  ls->trace_step[ls->n_trace] = ls->step;
  ls->trace_loss[ls->n_trace++] = ls->window_loss / (double)ls->window_steps;
  ls->window_loss = 0;
  ls->window_steps = 0;
}

/* The share of the steps' time (step_s) spent waiting for input batches,
 * and the rate the workers delivered them at: when waiting is a visible
 * share, that rate is what limits the step. */
static void input_progress(rc__batch_source *bs, double step_s, rc_distill_progress *pg) {
  rc__prefetch_stats ps;
  rc__batch_source_stats(bs, &ps);
  pg->input_wait_share = step_s > 0 ? ps.wait_s / step_s : 0;
  pg->input_samples_per_s = pg->elapsed_s > 0 ? (double)ps.samples / pg->elapsed_s : 0;
}

static rc_status train_loop(run_state *st, rc_distill_result *r, const rc_distill_data *d, rc_err *e) {
  const rc_distill_config *c = st->c;
  const rc_graph *g = st->sg;
  loop_ctx lc = {st, r, {0}, 0, 0, 0, 0, 0, 0, 0};
  lc.spe = rc_dataset_n_batches(&st->train, st->batch, 1);
  lc.total = c->steps > 0 ? c->steps : c->epochs * lc.spe;
  lc.epochs = (lc.total + lc.spe - 1) / lc.spe;
  RC_TRY(setup_schedule(&lc, e));
  step_buffers sb = {0};
  RC_TRY(rc_params_add_snapshot(st->ps, &lc.best_slot, 0, e));
  RC_TRY(rc_params_add_snapshot(st->ps, &lc.good_slot, 1, e));
  RC_TRY(rc_params_save(st->ps, lc.best_slot, e));
  RC_TRY(rc_params_save(st->ps, lc.good_slot, e));
  r->epoch_loss = rc__calloc((size_t)lc.epochs + 1, sizeof(double));
  r->epoch_val = rc__calloc((size_t)lc.epochs + 1, sizeof(rc_metrics));
  sb.teacher = rc__malloc(sizeof(float) * (size_t)(st->batch * st->k + 1));
  sb.samples = rc__malloc(sizeof(int64_t) * (size_t)st->batch);
  sb.labels = d->labels ? rc__malloc(sizeof(int32_t) * (size_t)st->batch) : NULL;
  sb.bn_scratch = rc__malloc(sizeof(double) * rc__bn_scratch_count(g, st->train_plan, st->bn_nodes, st->n_bn));
  sb.slot_pos = rc__malloc(sizeof(int64_t) * (size_t)st->batch);
  sb.slot_sample = rc__malloc(sizeof(int64_t) * (size_t)st->batch);
  rc_status s = st->augmenting ? rc__distill_augment_buffers(st, &sb, e) : RC_OK;
  if (s != RC_OK) goto out;
  if (!r->epoch_loss || !r->epoch_val || !sb.teacher || !sb.samples || (d->labels && !sb.labels) ||
      !sb.bn_scratch || !sb.slot_pos || !sb.slot_sample) {
    s = rc__fail(e, RC_ERR_NOMEM, "out of memory");
    goto out;
  }
  st->train.labels = d->labels; /* indexed by sample, like the inputs */
  for (int i = 0; i < g->n_inputs; i++) sb.in[i] = rc_plan_tensor(st->train_plan, g->inputs[i])->data;
  loop_state ls = {0};
  ls.lr_scale = 1.0;
  ls.best = r->before;
  lc.fingerprint = run_fingerprint(&lc);
  if (c->resume_path) {
    if ((s = checkpoint_read(&lc, &ls, e)) != RC_OK) goto out;
    rc__log(&c->log, RC_LOG_INFO, "resumed from the checkpoint");
  } else if (c->bn == RC_BN_RECALIBRATE) {
    /* Done here, not on resume: the re-estimated statistics are in the store. */
    if ((s = rc__bn_recalibrate(st->sg, st->bn_nodes, st->n_bn, &st->train, st->batch, st->c->dist, e)) != RC_OK) goto out;
    if ((s = rc_params_save(st->ps, lc.good_slot, e)) != RC_OK) goto out;
    rc__log(&c->log, RC_LOG_INFO, "BatchNormalization running statistics re-estimated over the training samples");
  }
  rc__batch_source_run run = {c->seed,  st->batch, st->offset,         st->local,         lc.spe,
                              ls.epoch, ls.batch,  lc.total - ls.step, d->labels != NULL, 0};
  if ((s = rc__batch_source_start(&sb.source, &st->train, &run, e)) != RC_OK) goto out;
  double t0 = now_s(), comm0 = rc_dist_comm_seconds(c->dist), step_s = 0;
  int64_t start_step = ls.step, snap_every = lc.spe / 4 > 0 ? lc.spe / 4 : 1;
  rc_distill_progress pg = {0};
  pg.epochs = lc.epochs;
  pg.steps = lc.total;
  while (ls.step < lc.total && !ls.stopped) {
    if (ls.batch == 0 || ls.step == start_step) rc_dataset_shuffle(&st->train, c->seed, (uint64_t)ls.epoch);
    double loss = 0, ts = now_s();
    int bad = 0;
    if ((s = train_step(&lc, &ls, &sb, &loss, &bad, e)) != RC_OK) goto out;
    step_s += now_s() - ts;
    ls.step++;
    ls.batch++;
    if (bad) {
      /* Roll back to the last good state with half the rate. */
      ls.rollbacks++;
      if ((s = rc_params_restore(st->ps, lc.good_slot, e)) != RC_OK) goto out;
      ls.lr_scale *= 0.5;
      rc__log(&c->log, RC_LOG_WARN,
              "non-finite loss or gradient: rolled back to the last good state, learning rate halved");
      if (ls.rollbacks > c->max_rollbacks) ls.stopped = 1;
    } else {
      ls.ep_loss += loss;
      ls.ep_steps++;
      trace_loss(&ls, loss, lc.total);
      if (ls.step % snap_every == 0 && (s = rc_params_save(st->ps, lc.good_slot, e)) != RC_OK) goto out;
    }
    double el = now_s() - t0;
    pg.event = RC_DISTILL_STEP;
    pg.epoch = ls.epoch + 1;
    pg.step = ls.step;
    pg.loss = ls.ep_steps ? ls.ep_loss / (double)ls.ep_steps : NAN;
    pg.lr = sb.lr;
    pg.elapsed_s = el;
    pg.samples_per_s = el > 0 ? (double)((ls.step - start_step) * st->batch) / el : 0;
    pg.eta_s = ls.step > start_step ? el / (double)(ls.step - start_step) * (double)(lc.total - ls.step) : 0;
    input_progress(&sb.source, step_s, &pg);
    notify(c, &pg);
    int epoch_done = ls.batch == lc.spe || ls.step == lc.total || ls.stopped;
    if (epoch_done && (s = end_epoch(&lc, &ls, &pg, e)) != RC_OK) goto out;
    int interrupted = stop_asked(&lc);
    if ((ls.step % RC_DIST_CHECK_EVERY == 0 || ls.step == lc.total) && (s = check_ranks_agree(st, ls.step, e)) != RC_OK)
      goto out;
    if (c->checkpoint_path &&
        (epoch_done || interrupted || (c->checkpoint_every > 0 && ls.step % c->checkpoint_every == 0)) &&
        ls.step < lc.total && (s = checkpoint_write(&lc, &ls, e)) != RC_OK)
      goto out;
    if (interrupted && ls.step < lc.total) {
      s = rc__fail(e, RC_ERR_INTERRUPTED, "interrupted at step %lld of %lld%s%s", (long long)ls.step,
                   (long long)lc.total, c->checkpoint_path ? "; checkpoint written to " : "",
                   c->checkpoint_path ? c->checkpoint_path : "");
      goto out;
    }
  }
  r->steps_done = ls.step;
  r->seconds = now_s() - t0;
  if (ls.step > start_step)
    r->comm_seconds_per_step = (rc_dist_comm_seconds(c->dist) - comm0) / (double)(ls.step - start_step);
  r->samples_per_s = r->seconds > 0 ? (double)((ls.step - start_step) * st->batch) / r->seconds : 0;
  r->best_epoch = ls.best_epoch;
  r->improved = ls.best_epoch > 0;
  r->select_alpha = select_alpha(st);
  r->rollbacks = (int)ls.rollbacks;
  r->stopped_nonfinite = (int)ls.stopped;
  r->n_epochs = ls.n_epochs;
  r->steps_per_epoch = lc.spe;
  r->n_trace = (int)ls.n_trace;
  memcpy(r->trace_step, ls.trace_step, sizeof r->trace_step);
  memcpy(r->trace_loss, ls.trace_loss, sizeof r->trace_loss);
  if ((s = rc_params_restore(st->ps, lc.best_slot, e)) != RC_OK) goto out;
  if ((s = check_ranks_agree(st, ls.step, e)) != RC_OK) goto out;
  r->after = ls.best;
out:
  rc__batch_source_stop(&sb.source);
  rc__free(sb.teacher);
  rc__free(sb.samples);
  rc__free(sb.labels);
  rc__free(sb.bn_scratch);
  rc__free(sb.partner);
  rc__free(sb.slot_pos);
  rc__free(sb.slot_sample);
  rc__free(sb.partner_order);
  rc__free(sb.partner_labels);
  rc__free(sb.mix_rows);
  rc__free(sb.aug_work);
  return s;
}

/* ---- Inside the models -------------------------------------------------------- */

static rc_status measure_inside(run_state *st, rc_distill_result *r, rc_pairing *pg, int after, rc_err *e) {
  rc_measure_setup m;
  rc_tensor shapes[RC_DATASET_MAX_INPUTS], tin[RC_DATASET_MAX_INPUTS];
  unsigned char *live = NULL;
  rc_status s = measure_setup(st, &m, shapes, tin, &live, e);
  if (s == RC_OK) s = rc__measure_run(&m, pg, r, after, e);
  rc__free(live);
  return s;
}

/* Under MPI: every rank starts from rank 0's values, and sends the
 * gradients of entries that train (not frozen tensors, not running
 * statistics, not a tensor that feeds no output). */
static rc_status setup_ranks(run_state *st, rc_err *e) {
  rc_dist *d = st->c->dist;
  if (rc_dist_size(d) < 2) return RC_OK;
  if (st->c->n_output_losses)
    /* Their terms divide by counts known only per batch (labelled positions,
     * targets that are not NaN), so each rank's share would weigh its part
     * by its own count, not the global batch's; validation keeps confusion
     * matrices that are not reduced either. */
    return rc__fail(e, RC_ERR_UNSUPPORTED,
                    "per-output losses are not supported over %d ranks yet (their terms are "
                    "normalised by each batch's count of labelled positions and valid targets, which would differ "
                    "per rank, and their validation is not shared); run one process",
                    rc_dist_size(d));
  RC_TRY(rc_dist_bcast(d, rc_params_block(st->ps, RC_BLOCK_VALUE, -1), sizeof(float) * rc_params_total(st->ps), e));
  int n = rc_params_count(st->ps);
  unsigned char *send = rc__malloc((size_t)n + 1);
  if (!send) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  memset(send, 1, (size_t)n);
  for (int i = 0; i < st->n_tr; i++) {
    int v = st->tr[i].value;
    if (!st->trainable_mask[v] || !rc_plan_grad(st->train_plan, v)) send[st->tr[i].entry] = 0;
  }
  rc_status s = rc__grad_sync_init(&st->sync, st->ps, send, 2, e);
  rc__free(send);
  return s;
}

static void free_state(run_state *st) {
  rc__grad_sync_free(&st->sync);
  restore_graph_buffers(st);
  rc__qat_restore(st->sg, &st->qat);
  rc__qat_free(&st->qat);
  rc_plan_free(st->train_plan);
  rc_plan_free(st->eval_plan);
  rc_plan_free(st->teacher_plan);
  rc_plan_free(st->teacher_step);
  rc__free(st->patterns);
  rc__arena_free(&st->patterns_mem);
  rc__outputs_free(st->outs);
  rc__features_free(st->feat);
  rc__free(st->tkeep);
  rc__free(st->skeep);
  rc_dataset_free(&st->train);
  rc_dataset_free(&st->val);
  rc_data_split_free(&st->split);
  rc_params_free(st->ps);
  rc__free(st->tr);
  rc__free(st->bn_nodes);
  rc__free(st->trainable_mask);
  rc__free(st->rules);
  rc__free(st->rule_value);
  rc_spill_free(&st->teacher_cache);
  rc__free(st->teacher_have);
  rc__free(st->teacher_val_logits);
  rc__free(st->val_logits);
}

/* Rewrite the student's QDQ sites for training, with the ranges and the
 * pruning its file records. */
static rc_status prepare_grids(run_state *st, const rc_tensor *data, rc_err *e) {
  rc_tensor shapes[RC_DATASET_MAX_INPUTS];
  rc__input_shapes(st->sg, data, 1, shapes);
  rc_file_notes notes;
  RC_TRY(rc__file_notes_parse(&notes, rc_model_metadata(st->student, RC_RANGES_METADATA),
                              rc_model_metadata(st->student, RC_PRUNED_METADATA), st->sg->path, e));
  rc_status s = rc__qat_prepare(st->sg, shapes, &notes, st->c->mask, &st->qat, e);
  rc__file_notes_free(&notes);
  return s;
}

static rc_status record_changes(run_state *st, rc_distill_result *r, rc_err *e) {
  r->changed = rc__malloc(sizeof(int) * (size_t)(st->n_tr + st->qat.n + 1));
  if (!r->changed) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  for (int i = 0; i < st->n_tr; i++) {
    const rc_param_entry *pe = rc_params_entry(st->ps, st->tr[i].entry);
    /* Shadows live only in memory; their integer initializers are saved. */
    if (st->sg->values[st->tr[i].value].init_index >= 0)
      r->changed[r->n_changed++] = st->tr[i].value;
    if (st->trainable_mask[st->tr[i].value]) {
      r->n_trainable_tensors++;
      r->n_trainable += pe->numel - pe->n_frozen;
    }
    r->n_frozen_zeros += pe->n_frozen;
  }
  for (int i = 0; i < st->qat.n; i++)
    if (st->qat.sites[i].int_value >= 0) {
      r->changed[r->n_changed++] = st->qat.sites[i].int_value;
      r->n_grids++;
    }
  for (int k = 0; k < st->n_rules; k++)
    for (int i = 0; i < st->n_tr; i++)
      if (st->tr[i].value == st->rule_value[k]) st->rules[k].frozen = rc_params_entry(st->ps, st->tr[i].entry)->n_frozen;
  r->rules = st->rules;
  r->n_rules = st->n_rules;
  st->rules = NULL;
  st->n_rules = 0;
  int entry;
  int64_t pos;
  r->mask_ok = rc_params_mask_intact(st->ps, &entry, &pos);
  if (!r->mask_ok)
    return rc__fail(e, RC_ERR_NUMERIC, "%s: pruned entry %lld of '%s' is no longer zero: refusing to write",
                    st->sg->path, (long long)pos, rc_params_entry(st->ps, entry)->name);
  return RC_OK;
}

/* What per-output runs do not combine with (yet): say so before training. */
static rc_status check_outputs_mode(const rc_distill_config *c, const rc_distill_data *d, rc_err *e) {
  if (d->labels)
    return rc__fail(e, RC_ERR_INVALID, "per-output losses: labels must be per position of a kd output (dense "
                    "labels), not one class per sample");
  for (int t = RC_TERM_HINT; t < RC_TERM_COUNT; t++)
    if (c->terms.weight[t] > 0)
      return rc__fail(e, RC_ERR_UNSUPPORTED, "per-output losses replace the logit terms and do not combine with "
                      "feature terms");
  return RC_OK;
}

/* Room for the teacher's logits on training samples, filled as steps draw
 * them (teacher_rows; none with augmentation), and its logits on the
 * validation samples, computed once now; the teacher's own figures. Each
 * rank caches the rows of its own part of the batches only. */
static rc_status teacher_setup(run_state *st, const rc_distill_data *d, const rc_distill_config *c,
                               rc_distill_result *r, rc_err *e) {
  int64_t pool = d->inputs[0].dims[0];
  if (!st->augmenting) {
    RC_TRY(rc_spill_alloc(&st->teacher_cache, sizeof(float) * (size_t)(pool * st->k), c->cache_bytes, c->cache_dir,
                          e));
    st->teacher_logits = st->teacher_cache.p;
    st->teacher_have = rc__calloc((size_t)pool + 1, 1);
    if (!st->teacher_have) return rc__fail(e, RC_ERR_NOMEM, "out of memory for the teacher-output cache");
    r->teacher_cache_in_file = st->teacher_cache.in_file;
    r->teacher_cache_bytes = (int64_t)st->teacher_cache.n;
  }
  st->teacher_val_logits = rc__malloc(sizeof(float) * (size_t)(st->val.n * st->k));
  st->val_logits = rc__malloc(sizeof(float) * (size_t)(st->val.n * st->k));
  if (!st->teacher_val_logits || !st->val_logits) return rc__fail(e, RC_ERR_NOMEM, "out of memory for logits");
  RC_TRY(teacher_pass(st, &st->val, st->teacher_val_logits, e));
  /* The teacher measured against itself gives its accuracy and the 100%/0 baseline. */
  return rc__metrics_compute(&r->teacher, st->teacher_val_logits, st->val_labels, st->teacher_val_logits, st->val.n,
                             st->k, e);
}

rc_status rc_distill_run(rc_distill_result *r, rc_model *teacher, rc_model *student, const rc_distill_data *d,
                         const rc_distill_config *c, rc_err *e) {
  memset(r, 0, sizeof *r);
  run_state st;
  memset(&st, 0, sizeof st);
  st.c = c;
  st.teacher = teacher;
  st.student = student;
  st.sg = &student->graph;
  int32_t *val_labels = NULL;
  rc_pairing layers = {0};
  rc_status s;
  if ((s = rc_distill_check_pair(&teacher->graph, st.sg, e)) != RC_OK) goto out;
  if (d->n_inputs != st.sg->n_inputs) {
    s = rc__fail(e, RC_ERR_INVALID, "%s has %d inputs, the data %d", st.sg->path, st.sg->n_inputs, d->n_inputs);
    goto out;
  }
  if ((s = prepare_grids(&st, d->inputs, e)) != RC_OK) goto out;
  if ((s = rc_optim_check(&c->optim, e)) != RC_OK) goto out;
  if (c->temperature <= 0 || !isfinite(c->temperature)) {
    s = rc__fail(e, RC_ERR_INVALID, "the temperature must be positive");
    goto out;
  }
  if (c->n_output_losses && (s = check_outputs_mode(c, d, e)) != RC_OK) goto out;
  st.train_side = &d->side;
  st.val_side = d->val_inputs ? &d->val_side : &d->side;
  if ((s = setup_data(&st, d, e)) != RC_OK) goto out;
  st.batch = c->batch < st.train.n ? c->batch : st.train.n;
  {
    int64_t hi;
    rc_dist_share(st.batch, rc_dist_rank(c->dist), rc_dist_size(c->dist), &st.offset, &hi);
    st.local = hi - st.offset;
    rc__dist_stats_init(&st.stats, c->dist, st.local, st.batch);
    if (st.local < 1) {
      s = rc__fail(e, RC_ERR_INVALID, "the global batch of %lld samples is smaller than the %d ranks",
                   (long long)st.batch, rc_dist_size(c->dist));
      goto out;
    }
  }
  r->n_train = st.train.n;
  r->n_val = st.val.n;
  if ((s = select_trainables(&st, e)) != RC_OK || (s = collect_bn(&st, e)) != RC_OK ||
      (s = build_store(&st, d->inputs, e)) != RC_OK || (s = build_plans(&st, d->inputs, r, &layers, e)) != RC_OK ||
      (s = setup_ranks(&st, e)) != RC_OK || (s = rc__distill_setup_augment(&st, d, r, e)) != RC_OK)
    goto out;
  if ((s = val_labels_of(&st, d, &val_labels, e)) != RC_OK) goto out;
  if (st.outs) {
    /* The teacher measured against itself: the 100%/0 baseline, its label figures. */
    if ((s = rc__outputs_validate(st.outs, st.teacher_step, st.teacher_step, &st.val, st.val_side, st.val.index,
                                  &r->teacher, e)) != RC_OK)
      goto out;
  } else if ((s = teacher_setup(&st, d, c, r, e)) != RC_OK) {
    goto out;
  }
  if ((s = validate(&st, &r->before, e)) != RC_OK) goto out;
  /* The layer table: every rank measures its share of the samples. */
  if ((s = measure_inside(&st, r, &layers, 0, e)) != RC_OK) goto out;
  if ((s = train_loop(&st, r, d, e)) != RC_OK) goto out;
  /* Training is over: the run's largest plan goes before the last pass. */
  rc_plan_free(st.train_plan);
  st.train_plan = NULL;
  if ((s = measure_inside(&st, r, &layers, 1, e)) != RC_OK) goto out;
  r->ranks = rc_dist_size(c->dist);
  r->teacher_cached_samples = st.teacher_cached;
  r->comm_values_per_step = (int64_t)st.sync.n;
  if ((s = rc__qat_write_back(st.sg, &st.qat, e)) != RC_OK) goto out;
  s = record_changes(&st, r, e);
out:
  rc__free(val_labels);
  rc_pairing_free(&layers);
  free_state(&st);
  return s;
}
