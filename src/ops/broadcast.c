#include "ops/broadcast.h"

#include <string.h>

/* Runs longer than this are split so that one long run (equal shapes, a
 * scalar operand) still spreads over the threads. */
#define RUN_CHUNK 16384

void rc__bc_init(rc__bc *p, const rc_tensor *y, const rc_tensor *const *t, int n_in) {
  int64_t gdim[RC_MAX_RANK];
  int gflag[RC_MAX_RANK][RC__BC_MAX_IN];
  int ng = 0;
  memset(p, 0, sizeof *p);
  p->n_in = n_in;
  for (int d = 0; d < y->rank; d++) {
    int64_t dy = y->dims[d];
    if (dy == 1) continue; /* size-1 dims change no address */
    int f[RC__BC_MAX_IN];
    for (int k = 0; k < n_in; k++) {
      int id = d - (y->rank - t[k]->rank);
      int64_t dk = id >= 0 ? t[k]->dims[id] : 1;
      f[k] = dk == dy;
    }
    int same = ng > 0;
    for (int k = 0; k < n_in && same; k++) same = gflag[ng - 1][k] == f[k];
    if (same) {
      gdim[ng - 1] *= dy;
    } else {
      gdim[ng] = dy;
      for (int k = 0; k < n_in; k++) gflag[ng][k] = f[k];
      ng++;
    }
  }
  if (ng == 0) { /* scalar output, or every dim 1 */
    gdim[0] = 1;
    for (int k = 0; k < n_in; k++) gflag[0][k] = 1;
    ng = 1;
  }
  /* Element strides of each input over the groups, row-major. */
  int64_t gstride[RC__BC_MAX_IN][RC_MAX_RANK];
  for (int k = 0; k < n_in; k++) {
    int64_t s = 1;
    for (int g = ng - 1; g >= 0; g--) {
      gstride[k][g] = gflag[g][k] ? s : 0;
      if (gflag[g][k]) s *= gdim[g];
    }
  }
  p->nd = ng - 1;
  p->rows = 1;
  for (int g = 0; g < ng - 1; g++) {
    p->dim[g] = gdim[g];
    p->rows *= gdim[g];
    for (int k = 0; k < n_in; k++) p->stride[k][g] = gstride[k][g];
  }
  p->len = gdim[ng - 1];
  for (int k = 0; k < n_in; k++) p->inner[k] = gflag[ng - 1][k];
  if (rc_tensor_numel(y) == 0) p->rows = p->len = 0;
}

/* Offsets of run `row` in each input. */
static void row_offsets(const rc__bc *p, int64_t row, int64_t *off) {
  for (int k = 0; k < p->n_in; k++) off[k] = 0;
  for (int d = p->nd - 1; d >= 0; d--) {
    int64_t i = row % p->dim[d];
    row /= p->dim[d];
    for (int k = 0; k < p->n_in; k++) off[k] += i * p->stride[k][d];
  }
}

int rc__bc_run(const rc__bc *p, void *y, size_t ysize, const void *const *x, const size_t *xsize,
               rc__bc_row_fn fn) {
  if (p->rows == 0 || p->len == 0) return 0;
  int64_t nch = (p->len + RUN_CHUNK - 1) / RUN_CHUNK;
  int64_t items = p->rows * nch;
  int bad = 0;
#pragma omp parallel for reduction(| : bad) schedule(static) if (p->rows * p->len > RC__PAR_MIN)
  for (int64_t it = 0; it < items; it++) {
    int64_t row = it / nch, j0 = (it % nch) * RUN_CHUNK;
    int64_t n = p->len - j0 < RUN_CHUNK ? p->len - j0 : RUN_CHUNK;
    int64_t off[RC__BC_MAX_IN];
    const void *ptr[RC__BC_MAX_IN];
    row_offsets(p, row, off);
    for (int k = 0; k < p->n_in; k++)
      ptr[k] = (const char *)x[k] + (size_t)(off[k] + (p->inner[k] ? j0 : 0)) * xsize[k];
    bad |= fn((char *)y + (size_t)(row * p->len + j0) * ysize, ptr, p->inner, n);
  }
  return bad;
}

void rc__bc_grad(const rc__bc *p, int which, float *g, const float *dy, const void *const *x,
                 const size_t *xsize, const float *y, rc__bc_grad_fn fn) {
  if (p->rows == 0 || p->len == 0) return;
  /* Outer dims split into kept (this input varies along them: each output
   * element of g is owned by one kept index) and reduced ones (summed over,
   * serially and in a fixed order). */
  int64_t nkept = 1, nred = 1;
  for (int d = 0; d < p->nd; d++) {
    if (p->stride[which][d])
      nkept *= p->dim[d];
    else
      nred *= p->dim[d];
  }
  int gs = p->inner[which];
  int64_t nch = gs ? (p->len + RUN_CHUNK - 1) / RUN_CHUNK : 1;
  int64_t chunk = gs ? RUN_CHUNK : p->len;
  int64_t items = nkept * nch;
#pragma omp parallel for schedule(static) if (p->rows * p->len > RC__PAR_MIN)
  for (int64_t it = 0; it < items; it++) {
    int64_t kk0 = it / nch, j0 = (it % nch) * chunk;
    int64_t n = p->len - j0 < chunk ? p->len - j0 : chunk;
    for (int64_t rr = 0; rr < nred; rr++) {
      int64_t kk = kk0, r = rr, row = 0, ystride = 1;
      int64_t off[RC__BC_MAX_IN] = {0};
      for (int d = p->nd - 1; d >= 0; d--) {
        int64_t i;
        if (p->stride[which][d]) {
          i = kk % p->dim[d];
          kk /= p->dim[d];
        } else {
          i = r % p->dim[d];
          r /= p->dim[d];
        }
        row += i * ystride;
        ystride *= p->dim[d];
        for (int k = 0; k < p->n_in; k++) off[k] += i * p->stride[k][d];
      }
      const void *ptr[RC__BC_MAX_IN];
      for (int k = 0; k < p->n_in; k++)
        ptr[k] = (const char *)x[k] + (size_t)(off[k] + (p->inner[k] ? j0 : 0)) * xsize[k];
      int64_t yo = row * p->len + j0;
      fn(g + off[which] + (gs ? j0 : 0), gs, which, dy + yo, ptr, p->inner, y ? y + yo : NULL, n);
    }
  }
}

rc_status rc__need_float(const rc_node *n, const rc_tensor *t, int idx, rc_err *e) {
  if (t && t->dtype != RC_DTYPE_FLOAT)
    return rc__fail(e, RC_ERR_UNSUPPORTED,
                    "node '%s' (%s): input %d has dtype %s; this op is computed in float32 only",
                    n->label, n->op_type, idx, rc_dtype_name(t->dtype));
  return RC_OK;
}

rc_status rc__infer_broadcast(const rc_node *n, const rc_tensor *const *in, int first, int count,
                              rc_tensor *out, rc_err *e) {
  for (int i = first; i < first + count; i++)
    if (i >= n->n_in || !in[i])
      return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): input %d is required", n->label,
                      n->op_type, i);
  rc_tensor acc = *in[first];
  acc.data = NULL;
  for (int i = first + 1; i < first + count; i++) {
    rc_tensor next = acc;
    RC_TRY(rc__broadcast_shape(n, &acc, in[i], &next, e));
    acc = next;
  }
  acc.dtype = in[first]->dtype;
  acc.data = NULL;
  *out = acc;
  return rc__check_shape(n, out, e);
}

rc_status rc__binary_float_forward(const rc_kernel *k, rc__bc_row_fn fn, rc_err *e) {
  rc__bc p;
  const rc_tensor *t[2] = {k->in[0], k->in[1]};
  rc__bc_init(&p, k->out[0], t, 2);
  const void *x[2] = {t[0]->data, t[1]->data};
  const size_t xs[2] = {sizeof(float), sizeof(float)};
  rc__bc_run(&p, k->out[0]->data, sizeof(float), x, xs, fn);
  (void)e;
  return RC_OK;
}

void rc__binary_float_backward(const rc_kernel *k, rc__bc_grad_fn fn) {
  if (!k->dout[0]) return;
  rc__bc p;
  const rc_tensor *t[2] = {k->in[0], k->in[1]};
  rc__bc_init(&p, k->out[0], t, 2);
  const void *x[2] = {t[0]->data, t[1]->data};
  const size_t xs[2] = {sizeof(float), sizeof(float)};
  for (int i = 0; i < 2; i++)
    if (k->din[i])
      rc__bc_grad(&p, i, k->din[i]->data, k->dout[0]->data, x, xs, k->out[0]->data, fn);
}

rc_status rc__infer_unary_float(const rc_node *n, const rc_tensor *const *in, rc_tensor *out,
                                rc_err *e) {
  if (n->n_in < 1 || !in[0])
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): input 0 is required", n->label, n->op_type);
  RC_TRY(rc__need_float(n, in[0], 0, e));
  *out = *in[0];
  out->data = NULL;
  return rc__check_shape(n, out, e);
}
