/* What the oneDNN paths (conv_dnnl.c, conv_dnnl_1x1.c) share: status
 * checks, 64-byte workspace rounding, releasing memory objects and the
 * engine and stream, and the plan-kept state of a node. Include only under
 * RECOUP_HAVE_DNNL. */
#ifndef RC_OPS_DNNL_KIT_H
#define RC_OPS_DNNL_KIT_H

#include <oneapi/dnnl/dnnl.h>
#include <stddef.h>

#include "core/alloc.h"
#include "ops/op.h"

#define RC_DNNL_ALIGN 64

static inline int rc__dnnl_ok(dnnl_status_t st) { return st == dnnl_success; }

static inline size_t rc__dnnl_round_up(size_t n) { return (n + RC_DNNL_ALIGN - 1) & ~(size_t)(RC_DNNL_ALIGN - 1); }

static inline void rc__dnnl_memory_drop(dnnl_memory_t *m) {
  if (*m) dnnl_memory_destroy(*m);
  *m = NULL;
}

static inline void rc__dnnl_close(dnnl_engine_t *engine, dnnl_stream_t *stream) {
  if (*stream) dnnl_stream_destroy(*stream);
  if (*engine) dnnl_engine_destroy(*engine);
  *stream = NULL;
  *engine = NULL;
}

/* The CPU engine (the only one recoup makes) and a stream on it. */
static inline int rc__dnnl_open(dnnl_engine_t *engine, dnnl_stream_t *stream) {
  return rc__dnnl_ok(dnnl_engine_create(engine, dnnl_cpu, 0)) &&
         rc__dnnl_ok(dnnl_stream_create(stream, *engine, dnnl_stream_default_flags));
}

/* The data a path keeps in a node's state (zeroed, `bytes`, released by
 * `release`), made on first use. NULL when it could not be allocated (the
 * state is flagged: the plan then fails with RC_ERR_NOMEM; a later call
 * may still succeed) or when the state holds another path's data. */
static inline void *rc__dnnl_state_data(struct rc_op_state *state, size_t bytes, void (*release)(void *)) {
  if (!state->data) {
    state->data = rc__calloc(1, bytes);
    state->release = release;
    state->out_of_memory |= !state->data;
  }
  return state->release == release ? state->data : NULL;
}

#endif
