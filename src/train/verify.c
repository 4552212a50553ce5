/* Verification of a written student: reloaded from disk, it must give the
 * in-memory model's outputs exactly. */
#include "train/distill.h"

#include <math.h>
#include <string.h>

#include "plan/count.h"
#include "plan/load.h"
#include "plan/plan.h"

rc_status rc_distill_verify_written(const char *path, rc_model *student, const rc_tensor *inputs, int n_inputs,
                                    int64_t batch, double *max_diff, rc_err *e) {
  rc_model *back = NULL;
  rc_plan *pa = NULL, *pb = NULL;
  rc_status s = rc_model_load(&back, path, NULL, e);
  if (s != RC_OK) return rc__wrap(e, "reloading the written file");
  const rc_graph *ga = &student->graph, *gb = &back->graph;
  rc_tensor shapes[RC_DATASET_MAX_INPUTS];
  int64_t b = inputs[0].dims[0] < batch ? inputs[0].dims[0] : batch;
  rc__input_shapes(ga, inputs, b, shapes);
  *max_diff = 0;
  if ((s = rc_plan_init(&pa, ga, shapes, NULL, e)) != RC_OK || (s = rc_plan_init(&pb, gb, shapes, NULL, e)) != RC_OK)
    goto out;
  for (int i = 0; i < n_inputs && i < ga->n_inputs; i++) {
    size_t nb = rc_tensor_nbytes(rc_plan_tensor(pa, ga->inputs[i]));
    memcpy(rc_plan_tensor(pa, ga->inputs[i])->data, inputs[i].data, nb);
    memcpy(rc_plan_tensor(pb, gb->inputs[i])->data, inputs[i].data, nb);
  }
  if ((s = rc_plan_forward(pa, e)) != RC_OK || (s = rc_plan_forward(pb, e)) != RC_OK) goto out;
  for (int j = 0; j < ga->n_outputs; j++) {
    const rc_tensor *ta = rc_plan_tensor(pa, ga->outputs[j]), *tb = rc_plan_tensor(pb, gb->outputs[j]);
    if (ta->dtype != RC_DTYPE_FLOAT) continue;
    int64_t n = rc_tensor_numel(ta);
    for (int64_t i = 0; i < n; i++) {
      double dd = fabs((double)((float *)ta->data)[i] - ((float *)tb->data)[i]);
      if (!(dd <= *max_diff)) *max_diff = isnan(dd) ? INFINITY : dd;
    }
  }
  if (*max_diff > 0)
    s = rc__fail(e, RC_ERR_IO, "%s: the written model's outputs differ from the trained model's by %g", path,
                 *max_diff);
out:
  rc_plan_free(pa);
  rc_plan_free(pb);
  rc_model_free(back);
  return s;
}
