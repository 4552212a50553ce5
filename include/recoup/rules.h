/* What a weight's exact zeros mean and which integers a quantized weight may
 * hold: the facts distill reports per trained weight (recoup/distill.h) and
 * inspection shows per tensor. */
#ifndef RECOUP_RULES_H
#define RECOUP_RULES_H

#include <stdint.h>

#include "recoup/export.h"

/* Which zero weights stay zero: auto (zeros of float weights, and of
 * quantized weights recorded as pruned or far more common than rounding
 * explains), zeros (every zero, an integer at its zero point), none. */
typedef enum rc_mask_mode { RC_MASK_AUTO = 0, RC_MASK_ZEROS = 1, RC_MASK_NONE = 2 } rc_mask_mode;

/* What the zeros of one weight were taken to mean. */
typedef struct rc_mask_choice {
  int keep_zeros;   /* zeros are pruned and stay zero */
  const char *rule; /* which rule decided: "mask zeros", "mask none", "float", "recorded", "excess", "rounding" */
  int64_t at_zero;  /* entries at zero (or at the zero point) */
  int64_t beside_zero; /* quantized: entries at zero point - 1 and + 1 together */
} rc_mask_choice;

/* Where a quantized weight's integer range comes from: the dtype's own
 * range, the file's record, or the narrowest common range holding the
 * integers the tensor uses. */
typedef enum rc_range_source { RC_RANGE_DTYPE = 0, RC_RANGE_RECORDED = 1, RC_RANGE_OBSERVED = 2 } rc_range_source;

typedef struct rc_int_range {
  int32_t lo, hi; /* integers allowed */
  rc_range_source source;
  int has_used; /* used_lo/used_hi hold the tensor's integers */
  int64_t used_lo, used_hi;
} rc_int_range;

/* "dtype", "recorded" or "observed" ("?" outside the enum). */
RC_API const char *rc_range_source_name(rc_range_source s);

#endif
