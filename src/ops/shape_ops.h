/* Shared between shape.c (which holds the family table) and shape_index.c
 * (Concat, Split, Slice, Gather, Pad). Internal to the shape family. */
#ifndef RC_OPS_SHAPE_OPS_H
#define RC_OPS_SHAPE_OPS_H

#include "ops/op.h"

/* Plain copy of input 0 to output 0, and its gradient (din += dout). */
rc_status rc__shape_copy_forward(const rc_kernel *k, rc_err *e);
void rc__shape_copy_backward(const rc_kernel *k);
/* Error unless t is present with a dtype recoup computes with. */
rc_status rc__shape_need_numeric(const rc_node *n, const rc_tensor *t, int idx, rc_err *e);
/* Values of a 1-D integer input known at plan time (at most max of them). */
rc_status rc__shape_read_ints(const rc_node *n, const rc_tensor *const *in, int idx, int64_t *v, int max,
                              int *count, rc_err *e);
/* Refuses attribute `name` on a node of opset >= since, where the spec moved
 * it to an input: ignoring it would silently change the result. */
rc_status rc__shape_moved_attr(const rc_node *n, const char *name, int since, rc_err *e);
/* Normalise axes against rank, refusing duplicates and out-of-range ones. */
rc_status rc__shape_axes(const rc_node *n, const int64_t *axes, int count, int rank, int *out, rc_err *e);

rc_status rc__concat_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e);
rc_status rc__concat_forward(const rc_kernel *k, rc_err *e);
void rc__concat_backward(const rc_kernel *k);
rc_status rc__split_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e);
rc_status rc__split_forward(const rc_kernel *k, rc_err *e);
void rc__split_backward(const rc_kernel *k);
rc_status rc__slice_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e);
rc_status rc__slice_forward(const rc_kernel *k, rc_err *e);
void rc__slice_backward(const rc_kernel *k);
rc_status rc__gather_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e);
rc_status rc__gather_forward(const rc_kernel *k, rc_err *e);
void rc__gather_backward(const rc_kernel *k);
rc_status rc__pad_parse(rc_node *n, rc_arena *a, rc_err *e);
rc_status rc__pad_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e);
size_t rc__pad_workspace(const rc_kernel *k, int backward);
rc_status rc__pad_forward(const rc_kernel *k, rc_err *e);
void rc__pad_backward(const rc_kernel *k);

#endif
