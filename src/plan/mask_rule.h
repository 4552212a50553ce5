/* What an exact zero in a student's weight means: pruned (frozen at zero
 * during training) or just a value that happens to be zero (trainable).
 *
 *   zeros  every zero entry (an integer equal to its zero point, for a
 *          quantized tensor) is pruned;
 *   none   no entry is frozen;
 *   auto   float tensor: any exact zero is pruned (training never lands on
 *          exactly 0.0, so a zero was put there). Quantized tensor: pruned
 *          when the file says so (RC_PRUNED_METADATA, written by
 *          `recoup prune`, carried through `recoup quantize`), else when the
 *          zero point is far more common than rounding explains: more than
 *          RC_MASK_EXCESS times the mean count of its two neighbouring
 *          integers (zero point - 1 and + 1). Rounding a smooth weight
 *          distribution fills the zero bin about as much as its neighbours
 *          (bell-shaped weights: about 1-3x at 4 bits); magnitude pruning
 *          empties the neighbours and piles up zeros. */
#ifndef RC_GRAPH_MASK_RULE_H
#define RC_GRAPH_MASK_RULE_H

#include <stdint.h>

#include "plan/grid_range.h"

#define RC_MASK_EXCESS 4.0

/* rc_mask_mode and rc_mask_choice are public: recoup/model.h. */

const char *rc__mask_mode_name(rc_mask_mode m);
/* 1 if s is auto, zeros or none. */
int rc__mask_mode_parse(const char *s, rc_mask_mode *m);

/* Decide for tensor t named name. Quantized: t is the integer tensor,
 * zero_point NULL (zero) or one per channel, laid out (channels, inner) as
 * DequantizeLinear's axis says; float: zero_point NULL and quantized 0. */
void rc__mask_choose(rc_mask_mode mode, const rc_file_notes *notes, const char *name, const rc_tensor *t,
                     int quantized, const rc_tensor *zero_point, int64_t channels, int64_t inner, rc_mask_choice *c);

#endif
