/* Facts about a graph that inspect, distill and the reports share: which
 * initializers are layer weights, their sparsity and N:M pattern, and the
 * quantization grids of QDQ models. Parameter and multiply-accumulate counts
 * are in count.h. */
#ifndef RC_PLAN_INSPECT_H
#define RC_PLAN_INSPECT_H

#include "ir/ir.h"
#include "plan/plan.h"

/* RC_ROLE_AFFINE: a float initializer of more than one entry added to or
 * multiplied with an activation: the bias of a MatMul written as MatMul +
 * Add, the scale and shift of a normalisation written in basic ops (as
 * exporters do below opset 17), position embeddings. */
typedef enum rc_weight_role { RC_ROLE_WEIGHT = 0, RC_ROLE_BIAS = 1, RC_ROLE_NORM = 2, RC_ROLE_AFFINE = 3 } rc_weight_role;

typedef struct rc_weight_info {
  int value;          /* the initializer */
  int node;           /* the layer that consumes it (through DequantizeLinear if quantized) */
  rc_weight_role role;
  int in_axis;        /* input-channel axis of a weight, -1 if none */
  int quantized;      /* reached through DequantizeLinear */
  int64_t numel;
  int64_t zeros;      /* entries equal to zero (or to the zero point when quantized) */
  int nm_n, nm_m;     /* N:M pattern along in_axis, 0 when none holds */
} rc_weight_info;

/* Weights, biases and normalisation parameters of Conv, ConvTranspose, Gemm,
 * MatMul, PRelu, BatchNormalization and LayerNormalization, and affine
 * parameters of Add and Mul (see RC_ROLE_AFFINE), in node order.
 * *out is allocated with rc__malloc. */
rc_status rc__weights_collect(const rc_graph *g, rc_weight_info **out, int *n, rc_err *e);

typedef struct rc_grid_info {
  int node;          /* the DequantizeLinear (or QuantizeLinear) node */
  int value;         /* the quantized tensor: an integer initializer or an activation */
  int is_weight;     /* an initializer (weight or bias) rather than an activation */
  rc_dtype dtype;    /* integer type of the grid */
  int axis;          /* -1 for per-tensor */
  int64_t n_scale;
  const float *scale;
  const rc_tensor *zero_point; /* NULL when absent (zero) */
} rc_grid_info;

/* Quantization grids: every DequantizeLinear whose scale is an initializer
 * (directly or through Identity nodes), and every QuantizeLinear feeding one
 * (activation pairs). */
rc_status rc__grids_collect(const rc_graph *g, rc_grid_info **out, int *n, rc_err *e);

/* Zero count and N:M pattern of a tensor along axis (pattern checked for
 * M = 4, 8, 16 with N <= M/2; the first M that holds is reported). */
void rc__sparsity(const rc_tensor *t, int axis, int64_t zero_value, int64_t *zeros, int *nm_n, int *nm_m);

#endif
