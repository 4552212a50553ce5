#include "train/evaluate.h"

#include <string.h>

#include "train/loss.h"

rc_status rc__run_dataset(rc_plan *p, const rc_dataset *d, const int *values, int n_values,
                          void *const *outs, rc_err *e) {
  const rc_graph *g = rc_plan_graph(p);
  if (g->n_inputs != d->n_inputs)
    return rc__fail(e, RC_ERR_INVALID, "%s: the model has %d inputs, the data %d", g->path, g->n_inputs,
                    d->n_inputs);
  int64_t batch = rc_plan_tensor(p, g->inputs[0])->dims[0];
  void *in_bufs[RC_DATASET_MAX_INPUTS];
  for (int i = 0; i < d->n_inputs; i++) in_bufs[i] = rc_plan_tensor(p, g->inputs[i])->data;
  int64_t n_batches = rc_dataset_n_batches(d, batch, 0);
  for (int64_t b = 0; b < n_batches; b++) {
    int64_t count = 0;
    RC_TRY(rc_dataset_gather(in_bufs, NULL, &count, d, b, batch, e));
    if (count < batch) /* pad a short batch so no row holds stale or uninitialised memory */
      for (int i = 0; i < d->n_inputs; i++)
        memset((unsigned char *)in_bufs[i] + (size_t)count * d->sample_bytes[i], 0,
               (size_t)(batch - count) * d->sample_bytes[i]);
    RC_TRY(rc_plan_forward(p, e));
    for (int j = 0; j < n_values; j++) {
      const rc_tensor *t = rc_plan_tensor(p, values[j]);
      size_t per = rc_tensor_nbytes(t) / (size_t)(t->dims[0] ? t->dims[0] : 1);
      memcpy((unsigned char *)outs[j] + (size_t)(b * batch) * per, t->data, per * (size_t)count);
    }
  }
  return RC_OK;
}

rc_status rc__metrics_compute(rc_metrics *m, const float *logits, const int32_t *labels,
                              const float *ref, int64_t n, int64_t k, rc_err *e) {
  memset(m, 0, sizeof *m);
  m->n = n;
  m->top5 = -1;
  if (n == 0) return RC_OK;
  if (labels) {
    int64_t c1 = 0, c5 = 0;
    RC_TRY(rc_metric_topk(&c1, NULL, logits, labels, n, k, 1, e));
    m->has_labels = 1;
    m->top1 = (double)c1 / (double)n;
    RC_TRY(rc_loss_cross_entropy(&m->ce, NULL, NULL, 0, logits, labels, n, k, e));
    if (k >= 5) {
      RC_TRY(rc_metric_topk(&c5, NULL, logits, labels, n, k, 5, e));
      m->top5 = (double)c5 / (double)n;
    }
  }
  if (ref) {
    m->has_ref = 1;
    m->agreement = (double)rc_metric_agreement(NULL, logits, ref, n, k) / (double)n;
    RC_TRY(rc_metric_kl(&m->kl, NULL, logits, ref, n, k, e));
  }
  return RC_OK;
}
