/* Chains the plan runs as one step: a Conv whose output only a
 * BatchNormalization with running statistics reads, and/or a Relu or Clip
 * with constant bounds after it, with no value inside the chain read by
 * anything else (another node, a graph output, a kept value such as a
 * feature-loss tap). The Conv applies the rest as its epilogue
 * (ops/epilogue.h) in forward; backward turns the chain's output gradient
 * into the Conv's in one pass and adds the normalisation's parameter
 * gradients. Likewise a BatchNormalization with batch statistics (training
 * mode) and the Relu or Clip that alone reads its output: the activation
 * runs inside the normalisation's pass and its mask inside the
 * normalisation's backward (ops/norm.c), and the normalised values are never
 * written. The graph keeps every node, so written models are unchanged:
 * fusion is how a plan runs, and RECOUP_CONV_PATH=reference or unfused
 * (ops/kernel_choice.h) runs the steps one by one instead. */
#ifndef RC_PLAN_FUSE_H
#define RC_PLAN_FUSE_H

#include "core/arena.h"
#include "ops/epilogue.h"

typedef struct rc__chain {
  rc_kernel *conv, *bn, *act; /* bn or act NULL when absent; conv NULL: the
                                 chain starts at a training-mode bn */
  int last;                   /* step index of the chain's last node */
  rc__epilogue ep;
  float *mean;  /* the running mean, per channel */
  double *sums; /* backward's sums: sdy (M), then sdx (M) */
  float *rows;  /* backward's scratch: `threads` rows of P floats */
  int threads;
} rc__chain;

/* Finds the chains among a plan's steps. step_k[s] is step s's kernel,
 * step_of_node maps a node to its step (-1 when folded); held marks values
 * that must stay readable; is_const values known at plan time. *role gets
 * one entry per step: 0 plain, c + 1 for the head of chain c, -1 for a step
 * a chain absorbs. Memory comes from the arena. */
rc_status rc__chains_find(rc__chain **chains, int *n_chains, int **role, const rc_graph *g,
                          rc_kernel *const *step_k, int n_steps, const int *step_of_node,
                          const unsigned char *held, const unsigned char *is_const, rc_arena *a, rc_err *e);

rc_status rc__chain_forward(rc__chain *c, rc_err *e);
/* From the gradient of the chain's output: the Conv's output gradient
 * (when it has one) and the normalisation's parameter gradients. Returns 1
 * when the head step's own backward runs after it as a plain step (a Conv),
 * 0 when this was that backward (a training-mode normalisation). */
int rc__chain_backward(rc__chain *c);

#endif
