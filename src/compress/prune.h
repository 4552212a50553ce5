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
#include "recoup/prune.h"

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

#endif
