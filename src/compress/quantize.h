/* Post-training quantization of a dense float model into a QDQ model:
 * BatchNormalization folded into the Conv before it, weights on symmetric
 * per-output-channel integer grids, biases on int32 grids tied to the input
 * and weight scales, activations on per-tensor uint8 grids calibrated by
 * running the float model on sample data. The result is written as
 * integer initializers -> DequantizeLinear and QuantizeLinear ->
 * DequantizeLinear pairs, the form integer runtimes fuse into integer
 * kernels (see rc_quantize_model for the placement rules). */
#ifndef RC_COMPRESS_QUANTIZE_H
#define RC_COMPRESS_QUANTIZE_H

#include <stdint.h>

#include "core/status.h"
#include "plan/load.h"
#include "recoup/data.h"
#include "recoup/quantize.h"

/* The 4-bit weight grid as stored: int4 needs DequantizeLinear of opset 21
 * (ONNX 1.16) and IR version 10; older models get int8 tensors holding
 * values in [-7, 7]. */
rc_dtype rc_quant_weight_dtype(const rc_model *m, int weight_bits);

/* ---- Pieces, exposed for tests ---- */

/* Symmetric per-channel grid of a float weight w along axis: scale[c] =
 * max|w[c]| / qmax (1 for an all-zero channel), q = round-half-even(w/scale)
 * clamped to [-qmax, qmax]. q holds numel int8 entries, scale dims[axis]. */
void rc__quant_weight(int8_t *q, float *scale, const rc_tensor *w, int axis, int qmax);

/* Asymmetric uint8 grid for [lo, hi] widened to include 0 (so zero is exact). */
void rc__quant_act_grid(float lo, float hi, float *scale, int *zero_point);

/* Fold y = gamma * (conv(x) - mean) / sqrt(var + eps) + beta into the conv:
 * w (C_out, ...) and bias (C_out, may be NULL = zeros) are overwritten with
 * the folded values (bias must have room for C_out entries). */
void rc__fold_bn(float *w, float *bias, int64_t c_out, int64_t per_channel, const float *gamma, const float *beta,
                 const float *mean, const float *var, float eps);

#endif
