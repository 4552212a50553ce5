/* Pruning a dense model into a student for distillation: magnitude sparsity
 * (one threshold over all layers, or per layer), N:M semi-structured
 * sparsity along the input-channel axis, and removal of whole output
 * channels by L1 norm with every consumer rewritten so that the result is a
 * smaller valid model. Layers that cannot be rewritten are left as they are
 * and the report says which and why. Nothing here prints. */
#ifndef RC_COMPRESS_PRUNE_H
#define RC_COMPRESS_PRUNE_H

#include <stdint.h>

#include "core/status.h"
#include "onnx/model.h"

typedef enum rc_prune_scope { RC_PRUNE_GLOBAL = 0, RC_PRUNE_LAYER = 1 } rc_prune_scope;

typedef struct rc_prune_opts {
  double sparsity;        /* fraction of prunable weights set to zero, in [0, 1); 0: none */
  rc_prune_scope scope;   /* GLOBAL: one |w| threshold over all prunable weights; LAYER: each to `sparsity` */
  int nm_n, nm_m;         /* keep the N largest of every M along the input-channel axis; 0: none */
  double channels;        /* fraction of output channels removed per layer group, in [0, 1); 0: none */
  int include_first_last; /* also sparsify the first and last prunable layers */
} rc_prune_opts;

/* One prunable layer: a float weight initializer of Conv, ConvTranspose,
 * Gemm or MatMul. */
typedef struct rc_prune_layer {
  char layer[96];
  char op_type[24];
  char weight[96];
  rc_tensor before, after; /* shapes only (data NULL) */
  int64_t zeros;           /* after pruning */
  int nm_n, nm_m;          /* N:M pattern found after pruning (rc__sparsity), 0 when none */
  char note[200];          /* why (part of) the request was not applied, "" when it was */
} rc_prune_layer;

typedef struct rc_prune_report {
  int n_layers;
  rc_prune_layer *layers;  /* rc__malloc; rc_prune_report_free */
  int64_t params_before, params_after;
  int64_t macs_before, macs_after;       /* batch of one; -1 when the model does not plan */
  int64_t weights_total, weights_zero;   /* every prunable weight after pruning */
  int64_t channels_removed;
  int n_notes;
  char (*notes)[240];      /* refusals not tied to one layer (Reshape targets, ...) */
} rc_prune_report;

void rc_prune_report_free(rc_prune_report *r);

/* Prune m in place. *changed (rc__malloc, free with rc__free) lists the
 * initializers whose data changed, for rc_model_save; shape changes are
 * already in the kept message (onnx/reshape.h). Fills r->layers and notes
 * (not the totals, see rc_prune_file). Order: channels, then N:M, then
 * magnitude (which counts zeros already present, so N:M plus magnitude keeps
 * the pattern and reaches the requested total). A model whose Conv,
 * ConvTranspose, Gemm or MatMul weight comes through DequantizeLinear (QDQ)
 * is refused with RC_ERR_UNSUPPORTED: prune the float model, then quantize. */
rc_status rc_prune_model(rc_model *m, const rc_prune_opts *o, rc_prune_report *r, int **changed,
                         int *n_changed, rc_err *e);

/* Load `in`, prune, write `out` atomically (refusing to write over `in`),
 * then load the written file and plan it at batch 1 (every symbolic dim 1):
 * an output that does not plan, or whose output shapes differ from the
 * dense model's, is an error. Fills every field of r. */
rc_status rc_prune_file(const char *in, const char *out, const rc_prune_opts *o, rc_prune_report *r,
                        rc_err *e);

#endif
