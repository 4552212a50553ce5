/* Training a quantized (QDQ) student on its fixed integer grids.
 *
 * For training, the student graph is rewritten in memory (never in the file):
 * - an integer initializer feeding DequantizeLinear gets a float shadow,
 *   initialised from its dequantized value, and the DequantizeLinear becomes
 *   FakeQuantLinear(shadow) on the same scale and zero point;
 * - a QuantizeLinear -> DequantizeLinear pair (on a float weight or on an
 *   activation) becomes FakeQuantLinear -> Identity.
 * Scales, zero points, dtypes, axes and integer ranges are never touched;
 * a scale or zero point may reach its node through Identity nodes. After training the
 * shadows are requantized into their integer initializers on the unchanged
 * grid, float weights feeding QuantizeLinear are snapped to grid values, and
 * the graph is put back as it was. */
#ifndef RC_TRAIN_QAT_H
#define RC_TRAIN_QAT_H

#include <stdint.h>

#include "core/status.h"
#include "ir/ir.h"
#include "plan/mask_rule.h"

typedef struct rc_qat_site {
  int dq;            /* the DequantizeLinear node */
  int q;             /* its QuantizeLinear node, -1 for an integer initializer */
  int int_value;     /* the integer initializer, -1 for a pair */
  int shadow;        /* the float shadow of int_value, -1 for a pair */
  int float_weight;  /* a float initializer feeding the pair, -1 otherwise */
  int is_bias;       /* int32 bias */
  /* What the rewritten nodes were. */
  const struct rc_op_def *dq_def, *q_def;
  const char *dq_op, *q_op, *dq_domain, *q_domain;
  void *dq_params, *q_params;
  int dq_in0, dq_n_in;
  uint64_t grid_hash;  /* scale, zero point, their dtypes and the axis, at load */
  rc_int_range range;  /* the integers the grid allows (see plan/grid_range.h) */
  rc_mask_choice mask; /* whether the weight's zeros are pruned (not for biases or activations) */
} rc_qat_site;

/* A grid input (scale or zero point) computed from constants (Constant
 * nodes, Identity, Cast, ...) that was pointed at a folded copy. */
typedef struct rc_qat_rewire {
  int node, slot, old_value;
} rc_qat_rewire;

typedef struct rc_qat {
  rc_qat_site *sites;
  int n;
  rc_qat_rewire *rewired;
  int n_rewired;
  int rewritten;
} rc_qat;

/* Rewrite every QDQ site of g for training. Adds shadow values to g. shapes:
 * one tensor per graph input (dtype, concrete shape) to plan g once and fold
 * scales and zero points computed from constants into values of their own
 * (NULL: only initializers and Identity chains count). notes: the file's
 * recorded ranges and pruning (may be NULL); mask: what zeros of quantized
 * weights mean. Refuses a grid whose scale or zero point is not a constant,
 * naming the node, the input and why. */
rc_status rc__qat_prepare(rc_graph *g, const rc_tensor *shapes, const rc_file_notes *notes, rc_mask_mode mask,
                          rc_qat *q, rc_err *e);
/* Requantize shadows into their integer initializers and snap float weights
 * feeding QuantizeLinear onto their grids (in the data the graph points at).
 * First verifies that every grid (scale and zero point bytes, dtypes, axis)
 * is exactly as it was loaded, and then that every integer written lies in
 * its grid's range, refusing to go on otherwise. */
rc_status rc__qat_write_back(rc_graph *g, const rc_qat *q, rc_err *e);
/* Put every rewritten node back (idempotent). */
void rc__qat_restore(rc_graph *g, rc_qat *q);
void rc__qat_free(rc_qat *q);

#endif
