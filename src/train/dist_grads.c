#include "train/dist_grads.h"

#include <string.h>

#include "core/alloc.h"

static size_t packed_count(rc_params *ps, const unsigned char *send) {
  size_t n = 0;
  for (int i = 0; i < rc_params_count(ps); i++) {
    const rc_param_entry *pe = rc_params_entry(ps, i);
    if (send[i]) n += (size_t)(pe->numel - pe->n_frozen);
  }
  return n;
}

rc_status rc__grad_sync_init(rc_grad_sync *g, rc_params *ps, const unsigned char *send, int n_extra, rc_err *e) {
  memset(g, 0, sizeof *g);
  int n = rc_params_count(ps);
  g->send = rc__malloc((size_t)n + 1);
  if (!g->send) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  memcpy(g->send, send, (size_t)n);
  g->n = packed_count(ps, send);
  g->n_extra = n_extra;
  g->buf = rc__malloc(sizeof(float) * (g->n + (size_t)n_extra + 1));
  if (!g->buf) return rc__fail(e, RC_ERR_NOMEM, "out of memory for %zu gradient values", g->n);
  return RC_OK;
}

void rc__grad_sync_free(rc_grad_sync *g) {
  rc__free(g->send);
  rc__free(g->buf);
  memset(g, 0, sizeof *g);
}

/* dir 0: gradients into buf (scaled); 1: buf back into the gradients. */
static void pack(rc_grad_sync *g, rc_params *ps, float scale, int dir) {
  size_t k = 0;
  for (int i = 0; i < rc_params_count(ps); i++) {
    if (!g->send[i]) continue;
    const rc_param_entry *pe = rc_params_entry(ps, i);
    float *grad = rc_params_grad(ps, i);
    for (int64_t j = 0; j < pe->numel; j++) {
      if (pe->mask && !pe->mask[j]) continue;
      if (dir == 0)
        g->buf[k++] = grad[j] * scale;
      else
        grad[j] = g->buf[k++];
    }
  }
}

rc_status rc__grad_sync_run(rc_grad_sync *g, rc_dist *d, rc_params *ps, float scale, double *extra, rc_err *e) {
  pack(g, ps, scale, 0);
  for (int i = 0; i < g->n_extra; i++) g->buf[g->n + (size_t)i] = (float)(extra[i] * scale);
  RC_TRY(rc_dist_sum_f32(d, g->buf, g->n + (size_t)g->n_extra, e));
  pack(g, ps, 1, 1);
  for (int i = 0; i < g->n_extra; i++) extra[i] = g->buf[g->n + (size_t)i];
  return RC_OK;
}

uint64_t rc__params_checksum(rc_params *ps) {
  uint64_t h = 1469598103934665603ULL;
  for (int i = 0; i < rc_params_count(ps); i++) {
    const rc_param_entry *pe = rc_params_entry(ps, i);
    const unsigned char *p = (const unsigned char *)rc_params_value(ps, i);
    for (size_t j = 0; j < sizeof(float) * (size_t)pe->numel; j++) h = (h ^ p[j]) * 1099511628211ULL;
  }
  return h;
}
