/* FakeQuantLinear: the training-only op distill puts in place of QDQ nodes. */
#ifndef RC_OPS_FAKEQUANT_H
#define RC_OPS_FAKEQUANT_H

#include <stdint.h>

#include "ops/op.h"

#define RC_FAKE_QUANT_OP "FakeQuantLinear"
/* A domain no file imports: these nodes only ever exist in memory. */
#define RC_TRAINING_DOMAIN "ai.recoup.training"

typedef struct rc_fake_quant_params {
  int64_t axis;        /* the per-axis scale's axis (ignored for one scale) */
  int32_t qmin, qmax;  /* the grid's integer range (plan/grid_range.h), never wider than its type's */
} rc_fake_quant_params;

#endif
