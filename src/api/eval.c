/* recoup/eval.h: a model planned at one batch size, run over a dataset,
 * its outputs gathered and its first output measured. */
#include "recoup/eval.h"

#include <string.h>

#include "api/eval_outputs.h"
#include "core/alloc.h"
#include "core/status.h"
#include "onnx/model.h"
#include "plan/plan.h"
#include "train/evaluate.h"

#define EVAL_MAX_OUTPUTS 64

void rc_eval_settings_init(rc_eval_settings *s) {
  memset(s, 0, sizeof *s);
  s->batch = 64;
  s->ignore_label = RC_EVAL_DEFAULT_IGNORE_LABEL;
}

void rc__eval_batch_shapes(rc_tensor *shapes, const rc_dataset *d, int64_t batch) {
  for (int i = 0; i < d->n_inputs; i++) {
    shapes[i] = d->inputs[i];
    shapes[i].data = NULL;
    shapes[i].dims[0] = batch;
    if (d->to_float[i]) shapes[i].dtype = RC_DTYPE_FLOAT; /* converted per batch (rc_dataset_convert) */
  }
}

/* A model planned for batch b with every output gathered over d. */
typedef struct eval_run {
  rc_plan *plan;
  void *outs[EVAL_MAX_OUTPUTS];
  int n_outs;
} eval_run;

static void eval_run_free(eval_run *r) {
  for (int i = 0; i < r->n_outs; i++) rc__free(r->outs[i]);
  rc_plan_free(r->plan);
  memset(r, 0, sizeof *r);
}

static rc_status eval_run_model(eval_run *r, rc_model *m, const rc_dataset *d, int64_t batch, rc_err *e) {
  const rc_graph *g = &m->graph;
  if (g->n_inputs != d->n_inputs)
    return rc__fail(e, RC_ERR_SHAPE, "%s has %d inputs, the data %d", m->path, g->n_inputs, d->n_inputs);
  if (g->n_outputs > EVAL_MAX_OUTPUTS)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: more than %d outputs", m->path, EVAL_MAX_OUTPUTS);
  rc_tensor shapes[RC_DATASET_MAX_INPUTS];
  rc__eval_batch_shapes(shapes, d, batch);
  RC_TRY(rc_plan_init(&r->plan, g, shapes, NULL, e));
  for (int j = 0; j < g->n_outputs; j++) {
    const rc_tensor *t = rc_plan_tensor(r->plan, g->outputs[j]);
    if (t->rank < 1 || t->dims[0] != batch)
      return rc__fail(e, RC_ERR_SHAPE, "%s: output '%s' does not have the batch as its first axis", m->path,
                      g->values[g->outputs[j]].name);
    size_t per = rc_tensor_nbytes(t) / (size_t)batch;
    r->outs[j] = rc__malloc(per * (size_t)d->n + 1);
    if (!r->outs[j]) return rc__fail(e, RC_ERR_NOMEM, "out of memory for the outputs of %s", m->path);
    r->n_outs = j + 1;
  }
  return rc__run_dataset(r->plan, d, g->outputs, g->n_outputs, r->outs, e);
}

/* K of a float (N, K) first output, or 0 when the output is not one. */
static int64_t classes_of(const eval_run *r, const rc_model *m) {
  const rc_tensor *t = rc_plan_tensor(r->plan, m->graph.outputs[0]);
  return t->dtype == RC_DTYPE_FLOAT && t->rank == 2 ? t->dims[1] : 0;
}

static rc_status need_logits(const eval_run *r, const rc_model *m, rc_err *e) {
  if (classes_of(r, m)) return RC_OK;
  const rc_graph *g = &m->graph;
  const rc_tensor *t = rc_plan_tensor(r->plan, g->outputs[0]);
  return rc__fail(e, RC_ERR_SHAPE, "%s: accuracy needs a float (N, classes) first output; '%s' is %s of rank %d",
                  m->path, g->values[g->outputs[0]].name, rc_dtype_name(t->dtype), t->rank);
}

/* Hand the gathered outputs over to the result. */
static rc_status keep_outputs(rc_eval_result *res, eval_run *r, const rc_model *m, int64_t n, rc_err *e) {
  const rc_graph *g = &m->graph;
  res->names = rc__calloc((size_t)g->n_outputs, sizeof *res->names);
  res->outputs = rc__calloc((size_t)g->n_outputs, sizeof *res->outputs);
  if (!res->names || !res->outputs) return rc__fail(e, RC_ERR_NOMEM, "out of memory for the outputs of %s", m->path);
  for (int j = 0; j < g->n_outputs; j++) {
    res->names[j] = g->values[g->outputs[j]].name;
    res->outputs[j] = *rc_plan_tensor(r->plan, g->outputs[j]);
    res->outputs[j].dims[0] = n;
    res->outputs[j].data = r->outs[j];
    r->outs[j] = NULL;
    res->n_outputs = j + 1;
  }
  return RC_OK;
}

static rc_status eval_both(rc_eval_result *res, eval_run *r, eval_run *rr, rc_model *m, rc_model *ref,
                           const rc_dataset *d, const rc_eval_settings *s, rc_err *e) {
  if (d->n < 1) return rc__fail(e, RC_ERR_INVALID, "%s: no samples to evaluate on", m->path);
  if (s->batch < 1) return rc__fail(e, RC_ERR_INVALID, "evaluation batch %lld: expected at least 1", (long long)s->batch);
  int64_t batch = s->batch < d->n ? s->batch : d->n;
  RC_TRY(eval_run_model(r, m, d, batch, e));
  res->classes = classes_of(r, m);
  if (s->per_output || s->n_output_terms > 0) {
    RC_TRY(rc__eval_outputs(&res->metrics, m, ref, d, batch, s, &res->failed, e));
  } else if (d->labels || ref) {
    RC_TRY(need_logits(r, m, e));
    const float *ref_logits = NULL;
    if (ref) {
      RC_TRY(eval_run_model(rr, ref, d, batch, e));
      RC_TRY(need_logits(rr, ref, e));
      int64_t k2 = classes_of(rr, ref);
      if (k2 != res->classes)
        return rc__fail(e, RC_ERR_SHAPE, "%s has %lld classes, %s %lld", m->path, (long long)res->classes, ref->path,
                        (long long)k2);
      ref_logits = rr->outs[0];
    }
    RC_TRY(rc__metrics_compute(&res->metrics, r->outs[0], d->labels, ref_logits, d->n, res->classes, e));
  }
  if (s->keep_outputs) RC_TRY(keep_outputs(res, r, m, d->n, e));
  return RC_OK;
}

rc_status rc_eval_run(rc_eval_result *res, rc_model *m, rc_model *ref, const rc_dataset *d,
                      const rc_eval_settings *s, rc_err *e) {
  memset(res, 0, sizeof *res);
  rc_eval_settings dflt;
  if (!s) {
    rc_eval_settings_init(&dflt);
    s = &dflt;
  }
  eval_run r = {0}, rr = {0};
  rc_status st = eval_both(res, &r, &rr, m, ref, d, s, e);
  eval_run_free(&r);
  eval_run_free(&rr);
  if (st != RC_OK) {
    rc_output_part failed = res->failed;
    rc_eval_result_free(res);
    res->failed = failed;
  }
  return st;
}

rc_status rc_eval_metrics(rc_metrics *m, const float *logits, const int32_t *labels, const float *ref_logits,
                          int64_t n, int64_t k, rc_err *e) {
  return rc__metrics_compute(m, logits, labels, ref_logits, n, k, e);
}

void rc_eval_result_free(rc_eval_result *r) {
  for (int j = 0; j < r->n_outputs; j++) rc__free(r->outputs[j].data);
  rc__free(r->outputs);
  rc__free(r->names);
  memset(r, 0, sizeof *r);
}
