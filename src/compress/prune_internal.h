/* Pieces shared by the pruning files: the driver (prune.c), the
 * channel-removal engine (prune_channels.c) and magnitude and N:M selection
 * (prune_sparsity.c). Only those files include this header. */
#ifndef RC_COMPRESS_PRUNE_INTERNAL_H
#define RC_COMPRESS_PRUNE_INTERNAL_H

#include <string.h>

#include "compress/prune.h"
#include "ir/ir.h"

/* A prunable layer: the node, its float weight initializer and the weight's
 * input-channel axis (-1 if none). */
typedef struct layer {
  int node, value, in_axis;
} layer;

static inline int is_op(const rc_node *n, const char *op) { return !strcmp(n->op_type, op); }

static inline int op_in(const rc_node *n, const char *const *list) {
  for (; *list; list++)
    if (is_op(n, *list)) return 1;
  return 0;
}

static inline int is_float_init(const rc_graph *g, int v) {
  return v >= 0 && g->values[v].kind == RC_VALUE_INITIALIZER && g->values[v].decl.dtype == RC_DTYPE_FLOAT &&
         g->values[v].decl.data;
}

/* Add v to the list of changed initializers unless it is there; 0 when out
 * of memory. */
int rc__prune_changed_add(int **list, int *n, int v);

/* Remove the lowest-scoring fraction `frac` of output channels of the layers
 * ls[0..nl), rewriting every consumer (prune_channels.c); notes go to r. */
rc_status rc__prune_channels(rc_model *m, double frac, const layer *ls, int nl, rc_prune_report *r,
                             int **changed, int *n_changed, rc_err *e);

/* Zero the round(frac * n) weights of smallest |w| among the `sel` layers
 * (prune_sparsity.c). */
rc_status rc__prune_zero_smallest(rc_graph *g, const layer *ls, const int *sel, int ns, double frac, rc_err *e);
/* Keep the n largest |w| of every run of m along axis; 0 when the axis
 * length is not a multiple of m. */
int rc__prune_keep_n_of_m(rc_tensor *t, int axis, int n, int m);

#endif
