/* recoup/pairing.h: the pairing of train/pairing.h as a plain list. */
#include <string.h>

#include "core/alloc.h"
#include "core/status.h"
#include "onnx/model.h"
#include "plan/count.h"
#include "recoup/pairing.h"
#include "train/pairing.h"

static void pair_of(rc_model_pair *out, const rc_pair *p, const rc_model *teacher, const rc_model *student) {
  out->teacher = teacher->graph.values[p->teacher].name;
  out->student = student->graph.values[p->student].name;
  out->teacher_shape = p->t_shape;
  out->student_shape = p->s_shape;
  out->teacher_shape.data = out->student_shape.data = NULL;
  out->given = p->explicit_pair;
  out->by_name = p->by_name;
  out->projector = rc_pair_needs_projector(p);
}

rc_status rc_model_pairs(rc_model_pair **out, int *n, const rc_model *teacher, const rc_model *student,
                         const char *const *explicit_pairs, int n_explicit, rc_err *e) {
  *out = NULL;
  *n = 0;
  rc_tensor *ins = rc__batch1_inputs(&student->graph);
  if (!ins) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  rc_pairing pg = {0};
  rc_status s = rc_pairing_init(&pg, &teacher->graph, &student->graph, ins, explicit_pairs, n_explicit, 1, e);
  rc_model_pair *list = NULL;
  if (s == RC_OK && !(list = rc__calloc((size_t)pg.n + 1, sizeof *list)))
    s = rc__fail(e, RC_ERR_NOMEM, "out of memory");
  for (int i = 0; s == RC_OK && i < pg.n; i++) pair_of(&list[i], &pg.pairs[i], teacher, student);
  if (s == RC_OK) {
    *out = list;
    *n = pg.n;
  }
  rc_pairing_free(&pg);
  rc__free(ins);
  return s;
}
