/* Teacher and student must agree on input and output names, dtypes and
 * shapes, and both must take batches of any size, before distillation. */
#include "train/distill.h"

#include <stdio.h>

static rc_status check_io(const rc_graph *t, const int *tv, int tn, const rc_graph *s, const int *sv, int sn,
                          const char *what, rc_err *e) {
  if (tn != sn)
    return rc__fail(e, RC_ERR_SHAPE, "teacher %s has %d %ss, student %s has %d", t->path, tn, what, s->path, sn);
  for (int i = 0; i < sn; i++) {
    const rc_value *b = &s->values[sv[i]];
    int j = rc__graph_find_in(t, tv, tn, b->name);
    if (j < 0)
      return rc__fail(e, RC_ERR_SHAPE, "student %s '%s' (%s) has no %s of that name in teacher %s", what, b->name,
                      s->path, what, t->path);
    const rc_value *a = &t->values[tv[j]];
    if (a->decl.dtype != b->decl.dtype)
      return rc__fail(e, RC_ERR_SHAPE, "%s '%s': teacher dtype %s, student %s", what, b->name,
                      rc_dtype_name(a->decl.dtype), rc_dtype_name(b->decl.dtype));
    if (a->decl.rank >= 0 && b->decl.rank >= 0) {
      int ok = a->decl.rank == b->decl.rank;
      for (int d = 0; ok && d < a->decl.rank; d++)
        if (a->decl.dims[d] >= 0 && b->decl.dims[d] >= 0 && a->decl.dims[d] != b->decl.dims[d]) ok = 0;
      if (!ok) {
        char sa[128], sb[128];
        return rc__fail(e, RC_ERR_SHAPE, "%s '%s': teacher shape %s, student %s", what, b->name,
                        rc_shape_str(&a->decl, sa, sizeof sa), rc_shape_str(&b->decl, sb, sizeof sb));
      }
    }
  }
  return RC_OK;
}

/* Training runs batches of any size (--batch, the last partial batch, single
 * samples for pairing), so a model exported with a fixed batch dimension
 * cannot be trained as it is; say so instead of failing on a shape later. */
static rc_status check_free_batch(const rc_graph *g, const char *role, rc_err *e) {
  for (int i = 0; i < g->n_inputs; i++) {
    const rc_value *v = &g->values[g->inputs[i]];
    if (v->decl.rank >= 1 && v->decl.dims[0] >= 0)
      return rc__fail(e, RC_ERR_UNSUPPORTED, "%s %s: input '%s' has a fixed batch size of %lld; distillation needs a "
                      "free first axis (re-export the model with a dynamic batch dimension)", role, g->path, v->name,
                      (long long)v->decl.dims[0]);
  }
  return RC_OK;
}

rc_status rc_distill_check_pair(const rc_graph *t, const rc_graph *s, rc_err *e) {
  RC_TRY(check_free_batch(t, "teacher", e));
  RC_TRY(check_free_batch(s, "student", e));
  RC_TRY(check_io(t, t->inputs, t->n_inputs, s, s->inputs, s->n_inputs, "input", e));
  return check_io(t, t->outputs, t->n_outputs, s, s->outputs, s->n_outputs, "output", e);
}
