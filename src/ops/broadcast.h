/* Multidirectional (numpy) broadcasting for pointwise kernels, shared by the
 * elementwise and activation families.
 *
 * The output shape is split into "outer" dims and one contiguous inner run.
 * Adjacent dims where every input is either broadcast or not broadcast in the
 * same way are merged first, so the common cases collapse: equal shapes give
 * one run, a scalar gives one run read at a fixed address, a per-channel bias
 * (1,C,1,1) against (N,C,H,W) gives outer dims (N,C) and runs of H*W with the
 * bias constant over each run. Index arithmetic happens once per run, never
 * per element. */
#ifndef RC_OPS_BROADCAST_H
#define RC_OPS_BROADCAST_H

#include <stdint.h>

#include "ops/op.h"

#define RC__BC_MAX_IN 3
/* Below this many elements a pointwise loop stays on one thread. */
#define RC__PAR_MIN 32768

typedef struct rc__bc {
  int n_in;
  int nd;                                 /* outer dims */
  int64_t dim[RC_MAX_RANK];
  int64_t stride[RC__BC_MAX_IN][RC_MAX_RANK]; /* element strides, 0 where broadcast */
  int inner[RC__BC_MAX_IN];               /* 1: input steps along the run; 0: fixed over it */
  int64_t rows, len;                      /* rows * len == output elements */
} rc__bc;

/* Plan the loops for inputs t[0..n_in-1] broadcast to output shape y. */
void rc__bc_init(rc__bc *p, const rc_tensor *y, const rc_tensor *const *t, int n_in);

/* One run: y[0..n) from inputs x[k] (advancing along the run where inner[k]).
 * Returns nonzero to report a domain error (integer division by zero). */
typedef int (*rc__bc_row_fn)(void *y, const void *const *x, const int *inner, int64_t n);

/* Run fn over every run, in parallel; element sizes in bytes. Returns the OR
 * of the row results. */
int rc__bc_run(const rc__bc *p, void *y, size_t ysize, const void *const *x, const size_t *xsize,
               rc__bc_row_fn fn);

/* Gradient of one run for input `which`: if gs, add elementwise into g[0..n),
 * else add the run's sum into g[0]. dy and y advance along the run. */
typedef void (*rc__bc_grad_fn)(float *g, int gs, int which, const float *dy, const void *const *x,
                               const int *inner, const float *y, int64_t n);

/* Accumulate the gradient of input `which` into g (shape of that input),
 * reducing over broadcast dims. Deterministic: each element of g is owned by
 * one thread and summed in a fixed order. */
void rc__bc_grad(const rc__bc *p, int which, float *g, const float *dy, const void *const *x,
                 const size_t *xsize, const float *y, rc__bc_grad_fn fn);

/* Lane count for sums: partial sums by j % RC__LANES, added in a fixed tree. */
#define RC__LANES 8
static inline double rc__lanes_total(const double *s) {
  return ((s[0] + s[1]) + (s[2] + s[3])) + ((s[4] + s[5]) + (s[6] + s[7]));
}

/* Generate row and gradient functions for a float binary op.
 * FWD uses x (first input) and w (second); GA / GB are d(out)/d(x), d(out)/d(w)
 * times the incoming gradient d, and may use the output o. */
#define RC__BINARY_FLOAT_OP(name, FWD, GA, GB)                                                  \
  static inline float name##_f(float x, float w) { return (FWD); }                             \
  static inline float name##_ga(float x, float w, float o, float d) {                          \
    (void)x; (void)w; (void)o;                                                                 \
    return (GA);                                                                               \
  }                                                                                            \
  static inline float name##_gb(float x, float w, float o, float d) {                          \
    (void)x; (void)w; (void)o;                                                                 \
    return (GB);                                                                               \
  }                                                                                            \
  static int name##_row(void *y_, const void *const *in, const int *inner, int64_t n) {        \
    float *restrict y = y_;                                                                    \
    const float *restrict a = in[0], *restrict b = in[1];                                      \
    if (inner[0] && inner[1]) {                                                                \
      for (int64_t j = 0; j < n; j++) y[j] = name##_f(a[j], b[j]);                             \
    } else if (inner[0]) {                                                                     \
      const float w0 = b[0];                                                                   \
      for (int64_t j = 0; j < n; j++) y[j] = name##_f(a[j], w0);                               \
    } else if (inner[1]) {                                                                     \
      const float x0 = a[0];                                                                   \
      for (int64_t j = 0; j < n; j++) y[j] = name##_f(x0, b[j]);                               \
    } else {                                                                                   \
      const float v = name##_f(a[0], b[0]);                                                    \
      for (int64_t j = 0; j < n; j++) y[j] = v;                                                \
    }                                                                                          \
    return 0;                                                                                  \
  }                                                                                            \
  static inline __attribute__((always_inline)) float name##_gj(                                \
      const float *restrict dy, const float *restrict a, const float *restrict b,              \
      const float *restrict y, int64_t j, const int ia, const int ib, const int which) {       \
    float xa = a[ia ? j : 0], xb = b[ib ? j : 0];                                              \
    return which ? name##_gb(xa, xb, y[j], dy[j]) : name##_ga(xa, xb, y[j], dy[j]);            \
  }                                                                                            \
  static inline __attribute__((always_inline)) void name##_grad_k(                              \
      float *restrict g, const float *restrict dy, const float *restrict a,                    \
      const float *restrict b, const float *restrict y, int64_t n, const int ia, const int ib, \
      const int gs, const int which) {                                                         \
    if (gs) {                                                                                  \
      for (int64_t j = 0; j < n; j++) g[j] += name##_gj(dy, a, b, y, j, ia, ib, which);        \
      return;                                                                                  \
    }                                                                                          \
    /* Sums use RC__LANES independent accumulators: a fixed order (so still \
     * deterministic) without one long dependency chain. */                                  \
    double s[RC__LANES] = {0};                                                                 \
    int64_t j = 0;                                                                             \
    for (; j + RC__LANES <= n; j += RC__LANES)                                                 \
      for (int u = 0; u < RC__LANES; u++) s[u] += name##_gj(dy, a, b, y, j + u, ia, ib, which); \
    for (; j < n; j++) s[0] += name##_gj(dy, a, b, y, j, ia, ib, which);                       \
    g[0] += (float)rc__lanes_total(s);                                                         \
  }                                                                                            \
  static void name##_grad(float *g, int gs, int which, const float *dy, const void *const *in, \
                          const int *inner, const float *y, int64_t n) {                       \
    const float *a = in[0], *b = in[1];                                                        \
    switch ((inner[0] << 3) | (inner[1] << 2) | (gs << 1) | which) {                          \
      RC__GRAD_CASES(name)                                                                     \
    }                                                                                          \
  }

#define RC__GRAD_CASE(name, ia, ib, gs, wh) \
  case ((ia) << 3) | ((ib) << 2) | ((gs) << 1) | (wh): name##_grad_k(g, dy, a, b, y, n, ia, ib, gs, wh); break;
#define RC__GRAD_CASES(name)                                                                   \
  RC__GRAD_CASE(name, 0, 0, 0, 0) RC__GRAD_CASE(name, 0, 0, 0, 1) RC__GRAD_CASE(name, 0, 0, 1, 0) \
  RC__GRAD_CASE(name, 0, 0, 1, 1) RC__GRAD_CASE(name, 0, 1, 0, 0) RC__GRAD_CASE(name, 0, 1, 0, 1) \
  RC__GRAD_CASE(name, 0, 1, 1, 0) RC__GRAD_CASE(name, 0, 1, 1, 1) RC__GRAD_CASE(name, 1, 0, 0, 0) \
  RC__GRAD_CASE(name, 1, 0, 0, 1) RC__GRAD_CASE(name, 1, 0, 1, 0) RC__GRAD_CASE(name, 1, 0, 1, 1) \
  RC__GRAD_CASE(name, 1, 1, 0, 0) RC__GRAD_CASE(name, 1, 1, 0, 1) RC__GRAD_CASE(name, 1, 1, 1, 0) \
  RC__GRAD_CASE(name, 1, 1, 1, 1)

/* Attributes of a pointwise op (alpha, beta as the ONNX op names them). */
typedef struct rc__pw_params {
  float alpha, beta;
  int mode;
} rc__pw_params;

/* Generate forward and backward of a one-input float op. FWD uses x; BWD is
 * the incoming gradient d times d(out)/d(x) and may use x, the output o and
 * the attributes p. */
#define RC__UNARY_FLOAT_OP(name, FWD, BWD)                                                      \
  static rc_status name##_forward(const rc_kernel *k, rc_err *e) {                             \
    const rc__pw_params *p = k->params;                                                        \
    const float *restrict xs = k->in[0]->data;                                                 \
    float *restrict ys = k->out[0]->data;                                                      \
    int64_t n = rc_tensor_numel(k->in[0]);                                                     \
    (void)p; (void)e;                                                                          \
    _Pragma("omp parallel for schedule(static) if (n > 32768)")                                \
    for (int64_t i = 0; i < n; i++) {                                                          \
      const float x = xs[i];                                                                   \
      ys[i] = (FWD);                                                                           \
    }                                                                                          \
    return RC_OK;                                                                              \
  }                                                                                            \
  static void name##_backward(const rc_kernel *k) {                                            \
    if (!k->din[0] || !k->dout[0]) return;                                                     \
    const rc__pw_params *p = k->params;                                                        \
    const float *restrict xs = k->in[0]->data, *restrict ys = k->out[0]->data;                 \
    const float *restrict ds = k->dout[0]->data;                                               \
    float *restrict gs = k->din[0]->data;                                                      \
    int64_t n = rc_tensor_numel(k->in[0]);                                                     \
    (void)p;                                                                                   \
    _Pragma("omp parallel for schedule(static) if (n > 32768)")                                \
    for (int64_t i = 0; i < n; i++) {                                                          \
      const float x = xs[i], o = ys[i], d = ds[i];                                             \
      (void)x; (void)o;                                                                        \
      gs[i] += (BWD);                                                                          \
    }                                                                                          \
  }

/* Forward / backward drivers for a two-input float op whose output has the
 * broadcast shape of its inputs. */
rc_status rc__binary_float_forward(const rc_kernel *k, rc__bc_row_fn fn, rc_err *e);
void rc__binary_float_backward(const rc_kernel *k, rc__bc_grad_fn fn);
/* Shape inference for ops whose inputs broadcast together (numpy rules);
 * out dtype = dtype of input 0. */
rc_status rc__infer_broadcast(const rc_node *n, const rc_tensor *const *in, int first, int count,
                              rc_tensor *out, rc_err *e);
/* Shape inference for one-input float ops: out = in[0]. */
rc_status rc__infer_unary_float(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e);
/* Error naming the node unless in[i] has one of the listed dtypes. */
rc_status rc__need_float(const rc_node *n, const rc_tensor *t, int idx, rc_err *e);

#endif
