/* Post-training quantization of a dense float model into a QDQ model:
 * BatchNormalization folded into the Conv before it, weights on symmetric
 * per-output-channel integer grids, biases on int32 grids, activations on
 * per-tensor uint8 grids calibrated on sample data. The result holds integer
 * initializers -> DequantizeLinear and QuantizeLinear -> DequantizeLinear
 * pairs. */
#ifndef RECOUP_QUANTIZE_H
#define RECOUP_QUANTIZE_H

#include <stdint.h>

#include "recoup/data.h"
#include "recoup/export.h"
#include "recoup/model.h"
#include "recoup/status.h"
#include "recoup/tensor.h"

typedef enum rc_calib_method { RC_CALIB_MINMAX = 0, RC_CALIB_PERCENTILE = 1 } rc_calib_method;

typedef struct rc_quant_config {
  int weight_bits;       /* 8: int8 [-127, 127]; 4: int4 [-7, 7] */
  int activation_bits;   /* 8: uint8 per-tensor grids; 0: weights only */
  rc_calib_method calib; /* range of each activation tensor */
  double percentile;     /* RC_CALIB_PERCENTILE: keep this share of values, in (50, 100] */
  int64_t batch;         /* calibration batch size */
  double output_margin;  /* grids of graph outputs span (1 + margin) x the calibrated range, in [0, 10] */
} rc_quant_config;

#define RC_QUANT_MARGIN_MAX 10

/* 8-bit weights and activations, percentile 99.99, batch 64, output margin
 * 0.1: a 10% wider output grid costs log2(1.1) = 0.14 of its 8 bits of
 * resolution and keeps outputs up to 10% beyond the largest seen in
 * calibration apart instead of clipped to one value. */
RC_API void rc_quant_config_init(rc_quant_config *c);

/* One quantized layer (Conv, ConvTranspose, Gemm, MatMul). */
typedef struct rc_quant_layer {
  char name[96];         /* node label */
  char op_type[24];
  int64_t channels;      /* weight scales (per output channel) */
  int axis;              /* channel axis of the weight */
  float scale_min, scale_max;
  int bn_folded;         /* a BatchNormalization was folded into this Conv */
  int bias;              /* 0 none, 1 float kept, 2 int32 grid */
} rc_quant_layer;

/* One activation grid: y = (q - zero_point) * scale, q in [0, 255]. */
typedef struct rc_quant_grid {
  char tensor[96];
  float lo, hi;          /* calibrated range, widened to include 0 (and by the margin) */
  float scale;
  int zero_point;
  float margin;          /* share the range was stretched by: the output margin on graph outputs, else 0 */
} rc_quant_grid;

typedef struct rc_quant_report {
  int n_layers;
  rc_quant_layer *layers;
  int n_grids;
  rc_quant_grid *grids;
  int n_bn_folded;
  int n_bias_float;       /* biases left in float (no input grid, or int32 overflow) */
  rc_dtype weight_dtype;  /* dtype the weights are stored in: int8 or int4 */
  int int4_as_int8;       /* 4-bit values stored on int8 tensors (opset below 21) */
  int64_t calib_samples;
} rc_quant_report;

RC_API void rc_quant_report_free(rc_quant_report *r);

/* Rewrite m (as loaded by rc_model_load) into a QDQ model,
 * calibrating on the samples of d (every sample, in d's current order).
 * Only m->proto changes: save it with rc_model_save(m, path, NULL, 0).
 *
 * Placement: grids on the data input of every quantized layer and on its
 * output, where the output is taken after a folded BatchNormalization and
 * after a Relu or Clip that is its only consumer (integer runtimes fuse the
 * activation into the layer). One pair per tensor, shared by all consumers.
 * A tensor made by MaxPool or a layout op (Flatten, Reshape, Transpose,
 * Squeeze, Unsqueeze) from a tensor with a grid takes that same grid, so its
 * pair changes no value. Every other grid on a graph output spans its
 * calibrated range stretched by 1 + cfg->output_margin about zero.
 * Names: see grid_names in quantize.c (T.grid, T.grid_step, T.grid_zero,
 * T.on_grid, T.pre_grid; nodes T.to_grid and T.from_grid).
 * Refuses models below opset 13 (per-axis DequantizeLinear), models that
 * already hold QuantizeLinear/DequantizeLinear, and models with no layer to
 * quantize. */
RC_API rc_status rc_quantize_model(rc_model *m, const rc_dataset *d, const rc_quant_config *cfg, rc_quant_report *rep,
                            rc_err *e);

#endif
