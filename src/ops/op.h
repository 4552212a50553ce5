/* The contract between the planner/autodiff driver and every op kernel.
 *
 * Each op family file (conv.c, pool.c, ...) exports a table of rc_op_def; the
 * registry looks ops up by name. Forward and backward of an op sit side by
 * side in its family file. Kernels work on float32 unless the op is integer
 * by nature (Shape, Cast, Gather indices, QuantizeLinear outputs, ...). */
#ifndef RC_OPS_OP_H
#define RC_OPS_OP_H

#include <stddef.h>

#include "core/arena.h"
#include "core/status.h"
#include "ir/ir.h"
#include "recoup/tensor.h"

/* Sums across the processes that share one batch (a data-parallel run):
 * buf (n values) is replaced, on every process, by the sum of every
 * process's buf, in a fixed order. grads = 0: counts and statistics of the
 * inputs, summed as they are; grads = 1: sums of output gradients, which
 * each process holds in its own share's loss scale (the caller converts).
 * Backward kernels cannot return a status, so the caller that installs the
 * hook also keeps its failures and checks them after the pass. */
typedef struct rc_op_reduce {
  rc_status (*sum)(void *ctx, double *buf, size_t n, int grads, rc_err *e);
  void *ctx;
} rc_op_reduce;

/* Memory a kernel keeps across calls for one node and shape, owned by the
 * plan (a compute library's prepared primitives, say): data starts NULL,
 * the kernel fills it on first use and sets release, which the plan calls
 * when it is freed. A kernel that could not allocate it sets out_of_memory
 * (workspace callbacks cannot return a status); the plan then fails with
 * RC_ERR_NOMEM rather than run a slower path unnoticed. */
typedef struct rc_op_state {
  void *data;
  void (*release)(void *data);
  int out_of_memory;
} rc_op_state;

/* What a kernel sees for one node of one plan. Shapes are concrete. */
typedef struct rc_kernel {
  const rc_node *node;
  const void *params;          /* node->params */
  int n_in, n_out;
  rc_tensor *const *in;        /* NULL entry for an absent optional input */
  rc_tensor *const *out;       /* NULL entry for an unused optional output */
  /* Backward only: gradient tensors with the same shapes as in/out.
   * din[i] is NULL where input i needs no gradient; backward ADDS into din
   * (buffers are zeroed once per step by the driver, so fan-out is free).
   * dout[j] is NULL where output j receives no gradient (treat as zero). */
  rc_tensor *const *din;
  rc_tensor *const *dout;
  void *work;                  /* transient workspace, size from def->workspace */
  void *saved;                 /* kept from forward to backward, size from def->saved */
  int training;                /* batch statistics for BatchNormalization */
  size_t work_bytes;           /* size of work: at least def->workspace, maybe more */
  /* NULL when this process holds the whole batch; else batch statistics
   * (BatchNormalization in training mode) are summed through it. */
  const rc_op_reduce *reduce;
  /* NULL, or the kept positions of the weight input of an op flagged
   * RC_OP_SPARSE_WEIGHT (sparse.h), set by the plan from training masks. */
  const struct rc__wpattern *pattern;
  /* NULL where nothing is kept between calls (folding, single calls). */
  rc_op_state *state;
} rc_kernel;

typedef enum rc_op_flags {
  /* Output data depends only on input shapes (Shape, Size): always foldable. */
  RC_OP_SHAPE_ONLY = 1 << 0,
  /* No gradient flows through this op (integer results, comparisons). */
  RC_OP_NO_GRAD = 1 << 1,
  /* Input 1 is a weight whose kept positions may be given as a pattern
   * (rc_kernel.pattern): Conv, Gemm, MatMul. */
  RC_OP_SPARSE_WEIGHT = 1 << 2
} rc_op_flags;

typedef struct rc_op_def {
  const char *name;            /* ONNX op_type */
  const char *domain;          /* "" for the default domain */
  int min_opset, max_opset;    /* opsets this definition accepts */
  unsigned flags;
  /* Read and validate attributes at load time; set n->params (arena memory).
   * Refuse unsupported attribute values here, naming n->label. May be NULL. */
  rc_status (*parse)(rc_node *n, rc_arena *a, rc_err *e);
  /* Output dtypes and shapes from inputs. in[i] is NULL for an absent input;
   * in[i]->data is non-NULL when the input's value is known before the first
   * batch (initializers, folded constants), which ops such as Reshape need. */
  rc_status (*infer)(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e);
  /* Bytes of transient workspace for forward (backward = 0) or backward (1). May be NULL. */
  size_t (*workspace)(const rc_kernel *k, int backward);
  /* Bytes kept from forward to backward in training plans. May be NULL. */
  size_t (*saved)(const rc_kernel *k);
  rc_status (*forward)(const rc_kernel *k, rc_err *e);
  /* NULL for ops with no gradient. */
  void (*backward)(const rc_kernel *k);
} rc_op_def;

/* Registry (registry.c). Returns NULL for an unsupported op or opset. */
const rc_op_def *rc__op_find(const char *op_type, const char *domain, int opset);

/* Helpers shared by kernels (op_util.c). */
/* Normalise a possibly negative axis against rank; error names the node. */
rc_status rc__axis(const rc_node *n, int64_t axis, int rank, int *out, rc_err *e);
/* Error unless in[idx] is present with data known at plan time. */
rc_status rc__need_const(const rc_node *n, const rc_tensor *const *in, int idx, rc_err *e);
/* Read element i of an integer tensor as int64. */
int64_t rc__int_at(const rc_tensor *t, int64_t i);
/* Numpy-style broadcast of two shapes into out (rank and dims); error names the node. */
rc_status rc__broadcast_shape(const rc_node *n, const rc_tensor *a, const rc_tensor *b, rc_tensor *out,
                              rc_err *e);
/* Check every dim >= 0 and the element count below RC_MAX_ELEMENTS. */
rc_status rc__check_shape(const rc_node *n, const rc_tensor *t, rc_err *e);

/* Largest tensor a plan will allocate, in elements: a limit so that a hostile
 * file cannot ask for an absurd allocation. 2^31 elements = 8 GiB of float. */
#define RC_MAX_ELEMENTS ((int64_t)1 << 31)

/* Family tables. */
#define RC_OP_FAMILIES(X) \
  X(conv) X(pool) X(matmul) X(elementwise) X(activation) X(softmax) X(norm) \
  X(shape) X(reduce) X(resize) X(quant) X(fakequant)

#define RC_OP_FAMILY_DECL(fam)                 \
  extern const rc_op_def rc__ops_##fam[];      \
  extern const int rc__ops_##fam##_count;
RC_OP_FAMILIES(RC_OP_FAMILY_DECL)
#undef RC_OP_FAMILY_DECL

#endif
