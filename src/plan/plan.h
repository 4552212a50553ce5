/* A plan: the graph compiled for concrete input shapes (one batch size).
 * Shapes and dtypes of every value are inferred, integer subgraphs that only
 * depend on shapes and constants are evaluated once, and one arena holds
 * every activation (and, for training plans, every gradient and the buffers
 * backward needs). Running a plan allocates nothing. */
#ifndef RC_PLAN_PLAN_H
#define RC_PLAN_PLAN_H

#include <stdint.h>

#include "core/status.h"
#include "ir/ir.h"
#include "ops/op.h"
#include "ops/sparse.h"

typedef struct rc_plan_opts {
  /* Training plan: keeps every activation backward needs and allocates
   * gradient buffers for values between a trainable value and the graph's
   * outputs (or the `keep` values, which losses may read). */
  int training;
  /* Per value (graph->n_values entries) or NULL: initializers to train.
   * Such values are never folded into constants. */
  const unsigned char *trainable;
  /* Per value or NULL: values that must stay readable after forward (inner
   * features read by losses, graph outputs always are). */
  const unsigned char *keep;
  /* BatchNormalization uses batch statistics (and updates running stats). */
  int bn_batch_stats;
  /* NULL, or: this plan runs one process's share of a batch split over
   * processes, and batch statistics are summed through this hook. */
  const rc_op_reduce *reduce;
  /* Most bytes the plan may hold (constants folded at plan time, the
   * activation block, folding scratch); 0 means RC_PLAN_DEFAULT_MAX_BYTES.
   * Sizes follow from the file, so a hostile model is refused with
   * RC_ERR_LIMIT before it can make the planner allocate without bound. */
  size_t max_bytes;
  /* Per value or NULL: the kept positions of a pruned weight (ops/sparse.h),
   * NULL entries for the rest. Every step that reads such a value as a
   * weight able to take a pattern (ops flagged RC_OP_SPARSE_WEIGHT) gets it
   * before the plan sizes workspaces, so a layer that will run sparse
   * prepares no state for a dense path it never takes. The caller builds
   * each pattern once (rc__wpattern_build), may hand the same array to
   * several plans, and keeps the patterns alive until the plans are freed;
   * a pattern must match its value's shape (rows = first axis). */
  const rc__wpattern *const *patterns;
} rc_plan_opts;

#define RC_PLAN_DEFAULT_MAX_BYTES ((size_t)64 << 30)

typedef struct rc_plan rc_plan;

/* Build a plan. `inputs` holds one tensor per graph input (g->inputs order)
 * giving dtype and concrete shape; data pointers are ignored. */
rc_status rc_plan_init(rc_plan **out, const rc_graph *g, const rc_tensor *inputs,
                       const rc_plan_opts *opts, rc_err *e);
void rc_plan_free(rc_plan *p);

/* The tensor of a value in this plan: concrete shape, data in the arena (or
 * the graph's initializer data). Graph inputs are written here before forward.
 * NULL data for values not kept (intermediate values of inference plans
 * share memory). */
rc_tensor *rc_plan_tensor(rc_plan *p, int value);
/* Gradient of a value (training plans), or NULL where none is tracked.
 * Gradients of graph outputs, kept values (opts.keep), inputs and
 * initializers are the caller's to seed and read; those of inner values
 * share memory by lifetime and hold their sums only while backward runs. */
rc_tensor *rc_plan_grad(rc_plan *p, int value);
/* Make the gradient of a value (a trainable initializer) accumulate into buf,
 * e.g. the parameter store's gradient block; the caller zeroes it. */
rc_status rc_plan_bind_grad(rc_plan *p, int value, float *buf, rc_err *e);
/* The weight pattern the step of node `node` was given (opts.patterns), or
 * NULL (no pattern, or the node is folded). */
const rc__wpattern *rc__plan_step_pattern(const rc_plan *p, int node);
/* 1 if the kernel of node `node` keeps prepared state in the plan (oneDNN's
 * primitives for a Conv), 0 otherwise. */
int rc__plan_step_has_state(const rc_plan *p, int node);
/* 1 if the value is a constant known at plan time (folded). */
int rc_plan_is_const(const rc_plan *p, int value);

rc_status rc_plan_forward(rc_plan *p, rc_err *e);
/* Zero the gradients a caller may seed or read (one memset); backward
 * clears each inner value's gradient itself, just before the first step
 * that adds into it. */
void rc_plan_zero_grad(rc_plan *p);
/* Reverse pass. The caller has written d(loss)/d(value) into the gradient
 * buffers of the values it computed the loss from. Gradients of trainable
 * initializers are then in rc_plan_grad(p, v). */
rc_status rc_plan_backward(rc_plan *p, rc_err *e);

/* Steps that run inside another's (a Conv's epilogue, plan/fuse.h) when
 * the plan runs its chains; 0 when it has none. */
int rc__plan_absorbed_steps(const rc_plan *p);

/* Bytes held by the plan's arena (activations, gradients, workspace). */
size_t rc_plan_bytes(const rc_plan *p);
const rc_graph *rc_plan_graph(const rc_plan *p);

#endif
