/* Conv through oneDNN's CPU convolutions (Debian's libdnnl), for one or two
 * spatial axes with groups, strides, padding and dilation: forward, input
 * gradient and weight gradient. Built only with RECOUP_HAVE_DNNL.
 *
 * Tensors stay in recoup's plain layouts (NCHW, OIHW; grouped weights are
 * the same memory seen as (G, M/G, C/G, KH, KW)), so no reorder runs. The
 * primitives of one node are made once and kept in the plan's state for
 * the node; oneDNN's scratchpad is taken from the op workspace (user
 * scratchpad mode), so a step allocates nothing of recoup's. oneDNN runs
 * on OpenMP, the runtime recoup's own kernels use, and takes as many
 * threads as omp_get_max_threads() gives when it executes: recoup's thread
 * setting governs it. Only the CPU engine is ever made.
 *
 * oneDNN's backward primitives overwrite their outputs while recoup's
 * backward adds into gradients, so the input and weight gradients are
 * written to the workspace and added. The bias gradient is conv.c's. */
#include "ops/conv_impl.h"

#ifdef RECOUP_HAVE_DNNL

#include <oneapi/dnnl/dnnl.h>
#include <string.h>

#include "core/alloc.h"
#include "ops/op.h"

#define ALIGN 64

/* One primitive with its scratchpad. */
typedef struct dnnl_step {
  dnnl_primitive_desc_t pd;
  dnnl_primitive_t prim;
  dnnl_memory_t pad;
  size_t pad_bytes;
} dnnl_step;

/* Everything kept for one node: the shape it was made for, the engine and
 * stream, and the memory objects whose data handles each call points at
 * the tensors. */
typedef struct dnnl_conv {
  rc__conv_geom g;
  int has_bias;
  dnnl_engine_t engine;
  dnnl_stream_t stream;
  dnnl_memory_desc_t src_md, wei_md, bias_md, dst_md;
  dnnl_memory_t src, wei, bias, dst;
  dnnl_step fwd, bwd_data, bwd_weights;
  int refused; /* oneDNN refused this shape: not asked again */
} dnnl_conv;

static size_t round_up(size_t n) { return (n + ALIGN - 1) & ~(size_t)(ALIGN - 1); }

int rc__conv_dnnl_fits(const rc__conv_geom *g) {
  /* canonical axis 0 is the third spatial axis: size 1 for 1-D and 2-D */
  return g->nsp <= 2 && g->p.img[0] == 1 && g->p.k[0] == 1 && !rc__conv_depthwise(g) && g->Cg > 0 && g->Mg > 0;
}

static void step_release(dnnl_step *s) {
  if (s->pad) dnnl_memory_destroy(s->pad);
  if (s->prim) dnnl_primitive_destroy(s->prim);
  if (s->pd) dnnl_primitive_desc_destroy(s->pd);
  memset(s, 0, sizeof *s);
}

static void conv_release(dnnl_conv *c) {
  step_release(&c->fwd);
  step_release(&c->bwd_data);
  step_release(&c->bwd_weights);
  dnnl_memory_t *mems[] = {&c->src, &c->wei, &c->bias, &c->dst};
  for (size_t i = 0; i < sizeof mems / sizeof mems[0]; i++)
    if (*mems[i]) dnnl_memory_destroy(*mems[i]), *mems[i] = NULL;
  if (c->stream) dnnl_stream_destroy(c->stream);
  if (c->engine) dnnl_engine_destroy(c->engine);
  c->stream = NULL;
  c->engine = NULL;
}

static void state_release(void *data) {
  if (!data) return;
  conv_release(data);
  rc__free(data);
}

/* Window figures of the two spatial axes as oneDNN counts them: dilation
 * 0 is dense, and the end padding is what the output size implies (ONNX
 * end padding that no window reaches is dropped). */
typedef struct dnnl_window {
  dnnl_dims_t strides, dilates, pad_l, pad_r;
} dnnl_window;

static dnnl_window window_of(const rc__conv_geom *g) {
  dnnl_window w;
  for (int i = 0; i < 2; i++) {
    const int j = i + 1; /* canonical axes 1 and 2 */
    const int64_t extent = (g->p.k[j] - 1) * g->p.d[j] + 1;
    const int64_t end = (g->p.pos[j] - 1) * g->p.s[j] + extent - g->p.img[j] - g->p.pad[j];
    w.strides[i] = g->p.s[j];
    w.dilates[i] = g->p.d[j] - 1;
    w.pad_l[i] = g->p.pad[j];
    w.pad_r[i] = end > 0 ? end : 0;
  }
  return w;
}

static int ok(dnnl_status_t st) { return st == dnnl_success; }

/* Memory descriptors and objects (no data yet) for the plain layouts. */
static int make_memories(dnnl_conv *c) {
  const rc__conv_geom *g = &c->g;
  dnnl_dims_t src = {g->N, g->C, g->p.img[1], g->p.img[2]}, dst = {g->N, g->M, g->p.pos[1], g->p.pos[2]};
  dnnl_dims_t wei = {g->G, g->Mg, g->Cg, g->p.k[1], g->p.k[2]}, bias = {g->M};
  if (g->G == 1) {
    dnnl_dims_t plain = {g->M, g->Cg, g->p.k[1], g->p.k[2]};
    if (!ok(dnnl_memory_desc_init_by_tag(&c->wei_md, 4, plain, dnnl_f32, dnnl_oihw))) return 0;
  } else if (!ok(dnnl_memory_desc_init_by_tag(&c->wei_md, 5, wei, dnnl_f32, dnnl_goihw))) {
    return 0;
  }
  if (!ok(dnnl_memory_desc_init_by_tag(&c->src_md, 4, src, dnnl_f32, dnnl_nchw)) ||
      !ok(dnnl_memory_desc_init_by_tag(&c->dst_md, 4, dst, dnnl_f32, dnnl_nchw)) ||
      !ok(dnnl_memory_desc_init_by_tag(&c->bias_md, 1, bias, dnnl_f32, dnnl_x)))
    return 0;
  return ok(dnnl_memory_create(&c->src, &c->src_md, c->engine, DNNL_MEMORY_NONE)) &&
         ok(dnnl_memory_create(&c->wei, &c->wei_md, c->engine, DNNL_MEMORY_NONE)) &&
         ok(dnnl_memory_create(&c->bias, &c->bias_md, c->engine, DNNL_MEMORY_NONE)) &&
         ok(dnnl_memory_create(&c->dst, &c->dst_md, c->engine, DNNL_MEMORY_NONE));
}

/* The primitive of an operation descriptor, with a user scratchpad. */
static int make_step(dnnl_conv *c, dnnl_step *s, const void *desc, const_dnnl_primitive_desc_t hint) {
  dnnl_primitive_attr_t attr = NULL;
  if (!ok(dnnl_primitive_attr_create(&attr))) return 0;
  int fine = ok(dnnl_primitive_attr_set_scratchpad_mode(attr, dnnl_scratchpad_mode_user)) &&
             ok(dnnl_primitive_desc_create(&s->pd, desc, attr, c->engine, hint));
  dnnl_primitive_attr_destroy(attr);
  if (!fine) return 0;
  const dnnl_memory_desc_t *pad = dnnl_primitive_desc_query_md(s->pd, dnnl_query_scratchpad_md, 0);
  s->pad_bytes = pad ? dnnl_memory_desc_get_size(pad) : 0;
  if (!ok(dnnl_primitive_create(&s->prim, s->pd))) return 0;
  return !s->pad_bytes || ok(dnnl_memory_create(&s->pad, pad, c->engine, DNNL_MEMORY_NONE));
}

static int make_forward(dnnl_conv *c) {
  const dnnl_window w = window_of(&c->g);
  dnnl_convolution_desc_t d;
  return ok(dnnl_dilated_convolution_forward_desc_init(&d, dnnl_forward_training, dnnl_convolution_direct,
                                                       &c->src_md, &c->wei_md, c->has_bias ? &c->bias_md : NULL,
                                                       &c->dst_md, w.strides, w.dilates, w.pad_l, w.pad_r)) &&
         make_step(c, &c->fwd, &d, NULL);
}

static int make_backward(dnnl_conv *c) {
  const dnnl_window w = window_of(&c->g);
  dnnl_convolution_desc_t dd, dw;
  return ok(dnnl_dilated_convolution_backward_data_desc_init(&dd, dnnl_convolution_direct, &c->src_md, &c->wei_md,
                                                             &c->dst_md, w.strides, w.dilates, w.pad_l, w.pad_r)) &&
         make_step(c, &c->bwd_data, &dd, c->fwd.pd) &&
         ok(dnnl_dilated_convolution_backward_weights_desc_init(&dw, dnnl_convolution_direct, &c->src_md,
                                                                &c->wei_md, NULL, &c->dst_md, w.strides, w.dilates,
                                                                w.pad_l, w.pad_r)) &&
         make_step(c, &c->bwd_weights, &dw, c->fwd.pd);
}

static int same_geometry(const rc__conv_geom *a, const rc__conv_geom *b) {
  return a->nsp == b->nsp && a->N == b->N && a->C == b->C && a->M == b->M && a->G == b->G && a->K == b->K &&
         !memcmp(&a->p, &b->p, sizeof a->p);
}

/* Makes what `backward` needs for this shape, keeping what c already has
 * when it was made for the same shape. Returns 0 when oneDNN refuses. */
static int prepare(dnnl_conv *c, const rc__conv_geom *g, int has_bias, int backward) {
  const int same = same_geometry(&c->g, g) && c->has_bias == has_bias;
  if (same && c->refused) return 0;
  if ((c->engine || c->refused) && !same) {
    conv_release(c);
    c->refused = 0;
  }
  if (!c->engine) {
    c->g = *g;
    c->has_bias = has_bias;
    if (!ok(dnnl_engine_create(&c->engine, dnnl_cpu, 0)) ||
        !ok(dnnl_stream_create(&c->stream, c->engine, dnnl_stream_default_flags)) || !make_memories(c))
      return 0;
  }
  if (!c->fwd.prim && !make_forward(c)) return 0;
  return !backward || c->bwd_data.prim || make_backward(c);
}

/* The node's kept primitives, made on first use; or, with no state to keep
 * them in, `local`, which the caller releases. NULL when oneDNN refuses. */
static dnnl_conv *conv_for(struct rc_op_state *state, dnnl_conv *local, const rc__conv_geom *g, int has_bias,
                           int backward) {
  dnnl_conv *c = local;
  memset(local, 0, sizeof *local);
  if (state) {
    if (!state->data) {
      state->data = rc__calloc(1, sizeof(dnnl_conv));
      state->release = state_release;
    }
    c = state->data;
    if (!c) return NULL;
  }
  if (prepare(c, g, has_bias, backward)) return c;
  conv_release(c);
  c->refused = 1;
  return NULL;
}

int rc__conv_dnnl_ready(const struct rc_op_state *state) {
  const dnnl_conv *c = state ? state->data : NULL;
  return c && c->fwd.prim;
}

static void finish(dnnl_conv *c, const dnnl_conv *local) {
  if (c == local) conv_release(c);
}

static size_t backward_floats(const rc__conv_geom *g) {
  return round_up(sizeof(float) * (size_t)(g->N * g->C * g->in_sp)) +
         round_up(sizeof(float) * (size_t)(g->M * g->Cg * g->K));
}

size_t rc__conv_dnnl_workspace(struct rc_op_state *state, const rc__conv_geom *g, int has_bias, int backward) {
  dnnl_conv local, *c = conv_for(state, &local, g, has_bias, backward);
  if (!c) return 0;
  size_t need = round_up(c->fwd.pad_bytes);
  if (backward) {
    const size_t pads = c->bwd_data.pad_bytes > c->bwd_weights.pad_bytes ? c->bwd_data.pad_bytes
                                                                         : c->bwd_weights.pad_bytes;
    need = backward_floats(g) + round_up(pads);
  }
  finish(c, &local);
  return need ? need : ALIGN;
}

/* Runs one primitive over the given (argument, memory, data) triples. */
typedef struct dnnl_bind {
  int arg;
  dnnl_memory_t mem;
  const void *data;
} dnnl_bind;

static int run(dnnl_conv *c, dnnl_step *s, dnnl_bind *binds, int n, void *pad) {
  dnnl_exec_arg_t args[6];
  for (int i = 0; i < n; i++) {
    if (!ok(dnnl_memory_set_data_handle(binds[i].mem, (void *)binds[i].data))) return 0;
    args[i] = (dnnl_exec_arg_t){binds[i].arg, binds[i].mem};
  }
  if (s->pad) {
    if (!ok(dnnl_memory_set_data_handle(s->pad, pad))) return 0;
    args[n++] = (dnnl_exec_arg_t){DNNL_ARG_SCRATCHPAD, s->pad};
  }
  return ok(dnnl_primitive_execute(s->prim, c->stream, n, args)) && ok(dnnl_stream_wait(c->stream));
}

int rc__conv_dnnl_forward(struct rc_op_state *state, const rc__conv_geom *g, float *y, const float *x,
                          const float *w, const float *b, void *work, size_t work_bytes) {
  dnnl_conv local, *c = conv_for(state, &local, g, b != NULL, 0);
  if (!c) return 0;
  int done = 0;
  if (work_bytes >= c->fwd.pad_bytes) {
    dnnl_bind binds[] = {{DNNL_ARG_SRC, c->src, x}, {DNNL_ARG_WEIGHTS, c->wei, w}, {DNNL_ARG_DST, c->dst, y},
                         {DNNL_ARG_BIAS, c->bias, b}};
    done = run(c, &c->fwd, binds, b ? 4 : 3, work);
  }
  finish(c, &local);
  return done;
}

static void add_into(float *dst, const float *src, int64_t n) {
  for (int64_t i = 0; i < n; i++) dst[i] += src[i];
}

int rc__conv_dnnl_backward(struct rc_op_state *state, const rc__conv_geom *g, int has_bias, float *dx, float *dw,
                           const float *x, const float *w, const float *dy, void *work, size_t work_bytes) {
  dnnl_conv local, *c = conv_for(state, &local, g, has_bias, 1);
  if (!c) return 0;
  const size_t pads = c->bwd_data.pad_bytes > c->bwd_weights.pad_bytes ? c->bwd_data.pad_bytes
                                                                       : c->bwd_weights.pad_bytes;
  int done = work_bytes >= backward_floats(g) + pads;
  float *tmp_dx = work;
  float *tmp_dw = (float *)((char *)work + round_up(sizeof(float) * (size_t)(g->N * g->C * g->in_sp)));
  void *pad = (char *)work + backward_floats(g);
  if (done && dx) {
    dnnl_bind binds[] = {{DNNL_ARG_DIFF_DST, c->dst, dy}, {DNNL_ARG_WEIGHTS, c->wei, w},
                         {DNNL_ARG_DIFF_SRC, c->src, tmp_dx}};
    done = run(c, &c->bwd_data, binds, 3, pad);
  }
  if (done && dw) {
    dnnl_bind binds[] = {{DNNL_ARG_SRC, c->src, x}, {DNNL_ARG_DIFF_DST, c->dst, dy},
                         {DNNL_ARG_DIFF_WEIGHTS, c->wei, tmp_dw}};
    done = run(c, &c->bwd_weights, binds, 3, pad);
  }
  /* Nothing is added until both products ran: a failure leaves the
   * gradients for the caller's other path. */
  if (done && dx) add_into(dx, tmp_dx, g->N * g->C * g->in_sp);
  if (done && dw) add_into(dw, tmp_dw, g->M * g->Cg * g->K);
  finish(c, &local);
  return done;
}

#else

/* Built without oneDNN: no Conv takes this path (conv.c asks fits first). */
int rc__conv_dnnl_fits(const rc__conv_geom *g) {
  (void)g;
  return 0;
}

int rc__conv_dnnl_ready(const struct rc_op_state *state) {
  (void)state;
  return 0;
}

size_t rc__conv_dnnl_workspace(struct rc_op_state *state, const rc__conv_geom *g, int has_bias, int backward) {
  (void)state, (void)g, (void)has_bias, (void)backward;
  return 0;
}

int rc__conv_dnnl_forward(struct rc_op_state *state, const rc__conv_geom *g, float *y, const float *x,
                          const float *w, const float *b, void *work, size_t work_bytes) {
  (void)state, (void)g, (void)y, (void)x, (void)w, (void)b, (void)work, (void)work_bytes;
  return 0;
}

int rc__conv_dnnl_backward(struct rc_op_state *state, const rc__conv_geom *g, int has_bias, float *dx, float *dw,
                           const float *x, const float *w, const float *dy, void *work, size_t work_bytes) {
  (void)state, (void)g, (void)has_bias, (void)dx, (void)dw, (void)x, (void)w, (void)dy, (void)work, (void)work_bytes;
  return 0;
}

#endif
