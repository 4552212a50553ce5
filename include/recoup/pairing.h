/* Which teacher tensors feature terms would match with which student
 * tensors: the outputs of Conv, ConvTranspose, Gemm and MatMul nodes and of
 * residual Adds, paired by equal name, else by position among candidates of
 * the same spatial size; explicit pairs replace automatic ones. */
#ifndef RECOUP_PAIRING_H
#define RECOUP_PAIRING_H

#include "recoup/export.h"
#include "recoup/model.h"
#include "recoup/status.h"
#include "recoup/tensor.h"

typedef struct rc_model_pair {
  const char *teacher, *student;          /* tensor names (point into the models) */
  rc_tensor teacher_shape, student_shape; /* at batch 1, data NULL */
  int given;                              /* from the explicit list */
  int by_name;                            /* matched by name (else by position) */
  int projector;                          /* widths differ: a learned projector bridges them */
} rc_model_pair;

/* Pair teacher with student (same inputs, planned at batch 1). Explicit
 * pairs are "TEACHER_TENSOR=STUDENT_TENSOR" (n_explicit may be 0); unknown
 * names and shapes that cannot pair are refused, naming the tensor. *out is
 * one allocation (rc_model_list_free). */
RC_API rc_status rc_model_pairs(rc_model_pair **out, int *n, const rc_model *teacher, const rc_model *student,
                                const char *const *explicit_pairs, int n_explicit, rc_err *e);

#endif
