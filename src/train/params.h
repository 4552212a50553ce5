/* The flat parameter store: every trainable tensor of a run laid out in one
 * float block, with gradients and optimizer moments in blocks of the same
 * layout (entry i lives at offset(i) in each of them).
 *
 * Life cycle (all allocation happens here, none per step):
 *   rc_params_init
 *   rc_params_add            once per trainable tensor (name, size, flags)
 *   rc_params_finalize       allocates the blocks, copies initial values in;
 *                            from now on rc_params_value(i) is stable, so the
 *                            plan's initializer tensors can point into it
 *   rc_params_build_masks    records which entries are exactly zero
 *   rc_params_add_snapshot   preallocated slots for rollback / best state
 *   ... training steps (optim.h) ...
 *   rc_params_free
 *
 * Masks: for entries flagged RC_PARAM_KEEP_ZEROS, positions that are exactly
 * zero when masks are built are frozen: clipping ignores their gradients and
 * the optimizers never touch their value or moments, so the zeros survive
 * bit for bit whatever momentum, Adam moments or weight decay do. */
#ifndef RC_TRAIN_PARAMS_H
#define RC_TRAIN_PARAMS_H

#include <stddef.h>
#include <stdint.h>

#include "core/status.h"

typedef enum rc_param_flag {
  /* BatchNormalization / LayerNormalization scale or bias: no weight decay
   * unless the optimizer config asks for it (decay_norm). */
  RC_PARAM_NORM = 1u << 0,
  /* Never decayed (biases, by the caller's choice). */
  RC_PARAM_NO_DECAY = 1u << 1,
  /* Zeros present when masks are built stay zero (pruned weights). */
  RC_PARAM_KEEP_ZEROS = 1u << 2
} rc_param_flag;

/* Which float block of the store. */
typedef enum rc_param_block {
  RC_BLOCK_VALUE = 0,
  RC_BLOCK_GRAD = 1,
  RC_BLOCK_MOMENT1 = 2, /* SGD momentum buffer, AdamW exp_avg */
  RC_BLOCK_MOMENT2 = 3  /* AdamW exp_avg_sq */
} rc_param_block;

typedef struct rc_param_entry {
  const char *name;
  int64_t numel;
  size_t offset;       /* in floats, 16-float (64-byte) aligned */
  unsigned flags;      /* rc_param_flag bits */
  const uint8_t *mask; /* numel bytes, 1 = trainable, 0 = frozen zero; NULL = none */
  int64_t n_frozen;    /* zeros frozen by the mask */
} rc_param_entry;

typedef struct rc_params rc_params;

rc_status rc_params_init(rc_params **out, rc_err *e);
void rc_params_free(rc_params *ps);

/* Register a tensor of numel floats; init (numel floats, may be NULL for
 * zeros) is read by rc_params_finalize, so it must stay valid until then.
 * *index (may be NULL) receives the entry index. Names are copied. */
rc_status rc_params_add(rc_params *ps, int *index, const char *name, int64_t numel,
                        const float *init, unsigned flags, rc_err *e);

/* Allocate values, gradients (zeroed) and n_moments (0, 1 or 2: see
 * rc_optim_moments) moment blocks (zeroed); copy initial values in. */
rc_status rc_params_finalize(rc_params *ps, int n_moments, rc_err *e);

int rc_params_count(const rc_params *ps);
/* Floats per block, padding included. */
size_t rc_params_total(const rc_params *ps);
const rc_param_entry *rc_params_entry(const rc_params *ps, int i);
/* Index of the entry called name, or -1. */
int rc_params_find(const rc_params *ps, const char *name);
int rc_params_moments(const rc_params *ps);

/* Entry i's slice of a block (NULL before finalize or for a block not
 * allocated). rc_params_block with i < 0 gives the whole block. */
float *rc_params_block(rc_params *ps, rc_param_block b, int i);
float *rc_params_value(rc_params *ps, int i);
float *rc_params_grad(rc_params *ps, int i);
void rc_params_zero_grad(rc_params *ps);

/* Optimizer steps taken (AdamW's bias correction depends on it). Exposed with
 * the raw blocks for checkpoints. */
int64_t rc_params_steps(const rc_params *ps);
void rc_params_set_steps(rc_params *ps, int64_t steps);

/* Build the masks of RC_PARAM_KEEP_ZEROS entries from the current values
 * (call once after finalize). Entries without a zero get no mask. */
rc_status rc_params_build_masks(rc_params *ps, rc_err *e);
/* 1 if every frozen position is still exactly zero; otherwise 0 with the
 * first violation's entry and element position written (either may be NULL). */
int rc_params_mask_intact(const rc_params *ps, int *entry, int64_t *pos);

/* 1 if every float of the block (entry ranges only) is finite; otherwise 0
 * with the first bad entry and position. Unallocated blocks count as finite. */
int rc_params_all_finite(const rc_params *ps, rc_param_block b, int *entry, int64_t *pos);

/* Snapshot slots, preallocated: with_moments = 0 keeps values only (enough to
 * keep the best state by validation), 1 keeps values, moments and the step
 * counter (needed to roll back after a non-finite step). *slot gets the id. */
rc_status rc_params_add_snapshot(rc_params *ps, int *slot, int with_moments, rc_err *e);
rc_status rc_params_save(rc_params *ps, int slot, rc_err *e);
/* Restore a saved slot; refuses a slot never saved. Gradients are zeroed. */
rc_status rc_params_restore(rc_params *ps, int slot, rc_err *e);

/* Checkpoint support: the whole mutable state as named float arrays of
 * rc_params_total() floats each ("param.value", "param.moment1", ...,
 * "snapshot1.moment2"), written and read in place, plus the step counters
 * (rc_params_steps) and each snapshot slot's saved flag and step counter. */
int rc_params_state_count(const rc_params *ps);
/* Array i (0 <= i < rc_params_state_count) with its name, or NULL. */
float *rc_params_state_array(rc_params *ps, int i, char *name, size_t cap);
int rc_params_snapshot_count(const rc_params *ps);
void rc_params_snapshot_state(const rc_params *ps, int slot, int *saved, int64_t *steps);
void rc_params_snapshot_set_state(rc_params *ps, int slot, int saved, int64_t steps);

#endif
