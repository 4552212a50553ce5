/* Pruning a dense model into a student for distillation: magnitude
 * sparsity (one threshold over all layers, or per layer), N:M
 * semi-structured sparsity along the input-channel axis, and removal of
 * whole output channels by L1 norm with every consumer rewritten. Layers
 * that cannot be rewritten are left as they are; the report says which and
 * why. */
#ifndef RECOUP_PRUNE_H
#define RECOUP_PRUNE_H

#include <stdint.h>

#include "recoup/export.h"
#include "recoup/status.h"
#include "recoup/tensor.h"

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
  int nm_n, nm_m;          /* N:M pattern found after pruning , 0 when none */
  char note[200];          /* why (part of) the request was not applied, "" when it was */
} rc_prune_layer;

typedef struct rc_prune_report {
  int n_layers;
  rc_prune_layer *layers;  /* freed by rc_prune_report_free */
  int64_t params_before, params_after;
  int64_t macs_before, macs_after;       /* batch of one; -1 when the model does not plan */
  int64_t weights_total, weights_zero;   /* every prunable weight after pruning */
  int64_t weights_kept_dense;            /* of those, in the first and last layers kept dense */
  int64_t channels_removed;
  int n_notes;
  char (*notes)[240];      /* refusals not tied to one layer (Reshape targets, ...) */
} rc_prune_report;

/* Nothing pruned: sparsity 0, global scope, no N:M, no channels, first and
 * last layers kept dense. Set the fields wanted after this. */
RC_API void rc_prune_opts_init(rc_prune_opts *o);

RC_API void rc_prune_report_free(rc_prune_report *r);

/* Load `in`, prune, write `out` atomically (refusing to write over `in`),
 * then load the written file and plan it at batch 1 (every symbolic dim 1):
 * an output that does not plan, or whose output shapes differ from the
 * dense model's, is an error. Fills every field of r. */
RC_API rc_status rc_prune_file(const char *in, const char *out, const rc_prune_opts *o, rc_prune_report *r,
                        rc_err *e);

#endif
