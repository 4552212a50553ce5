/* Pairing teacher tensors with student tensors for feature-level losses.
 *
 * Candidates are the outputs of Conv, ConvTranspose, Gemm and MatMul nodes
 * and of residual Adds (an Add whose two inputs are both float activations
 * of the same shape), in topological order. Automatic pairing matches, in
 * order of preference: the same tensor name in both graphs; otherwise the
 * same position among candidates whose spatial size (dims after the channel
 * axis) matches. Explicit pairs (--pair TEACHER=STUDENT) replace automatic
 * ones. Shapes come from plans at batch 1. */
#ifndef RC_TRAIN_PAIRING_H
#define RC_TRAIN_PAIRING_H

#include "core/status.h"
#include "ir/ir.h"
#include "plan/plan.h"
#include "recoup/tensor.h"

typedef struct rc_pair {
  int teacher, student;        /* value indices */
  rc_tensor t_shape, s_shape;  /* at batch 1 */
  int by_name;                 /* matched by name (else by position or given) */
  int explicit_pair;
  float weight;                /* per-pair weight (1 by default) */
} rc_pair;

typedef struct rc_pairing {
  rc_pair *pairs;
  int n;
} rc_pairing;

/* Explicit pairs as "TEACHER_TENSOR=STUDENT_TENSOR" strings (may be empty).
 * input_shapes: one tensor per student input at batch 1 (the teacher's
 * inputs have the same names). Unknown names and incompatible shapes (rank
 * or spatial size differ) are refused, naming the tensor. */
rc_status rc_pairing_init(rc_pairing *out, const rc_graph *teacher, const rc_graph *student,
                          const rc_tensor *input_shapes, const char *const *explicit_pairs, int n_explicit,
                          int automatic, rc_err *e);
void rc_pairing_free(rc_pairing *p);

/* Plans of both graphs at the given input shapes (the teacher's inputs take
 * the shapes of the student's inputs of the same name), for reading the
 * shapes of inner tensors. Free both with rc_plan_free. */
rc_status rc__pairing_plans(rc_plan **teacher, rc_plan **student, const rc_graph *tg, const rc_graph *sg,
                            const rc_tensor *input_shapes, rc_err *e);

/* 1 when the channel widths differ (a projector is needed). */
int rc_pair_needs_projector(const rc_pair *p);

#endif
