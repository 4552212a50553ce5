/* Parameter and multiply-accumulate counts, shared by inspect, prune and the
 * reports so that every figure is counted one way. */
#ifndef RC_PLAN_COUNT_H
#define RC_PLAN_COUNT_H

#include <stdint.h>

#include "core/status.h"
#include "ir/ir.h"
#include "plan/plan.h"

/* The graph's declared input shapes with every symbolic (or unknown) dim
 * taken as 1: the batch of one that counts are quoted for. One rc_tensor
 * per graph input, data NULL, from rc__malloc; NULL when out of memory. */
rc_tensor *rc__batch1_inputs(const rc_graph *g);
/* The same with every symbolic dim taken as b (inspect plans at 1 and 2 to
 * see which output dims follow the batch). */
rc_tensor *rc__batch_inputs(const rc_graph *g, int64_t b);
/* The same into ins (one rc_tensor per graph input), allocating nothing. */
void rc__input_shapes_declared(const rc_graph *g, int64_t b, rc_tensor *ins);
/* The shapes of samples `data` (one tensor per graph input, dims[0] =
 * samples) taken b at a time: data's shapes with dims[0] = b, data NULL. */
void rc__input_shapes(const rc_graph *g, const rc_tensor *data, int64_t b, rc_tensor *shapes);

/* Plan g for rc__batch1_inputs. */
rc_status rc__plan_batch1(rc_plan **p, const rc_graph *g, rc_err *e);

/* Multiply-accumulates of one node in a plan (Conv, ConvTranspose, Gemm,
 * MatMul; 0 for every other op). */
int64_t rc__node_macs(rc_plan *p, const rc_node *n);

/* Multiply-accumulates of the whole graph at batch 1; -1 with e set when it
 * does not plan. */
int64_t rc__graph_macs_batch1(const rc_graph *g, rc_err *e);

/* Parameters: entries of float and integer (8- and 4-bit) weight
 * initializers of rank >= 1. */
int64_t rc__graph_params(const rc_graph *g);

#endif
