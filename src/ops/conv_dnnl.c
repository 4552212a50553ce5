/* Conv through oneDNN's CPU convolutions (Debian's libdnnl), for one or two
 * spatial axes with groups, strides, padding and dilation: forward, input
 * gradient and weight gradient. Built only with RECOUP_HAVE_DNNL.
 *
 * The convolutions are described with layout "any": oneDNN picks blocked
 * layouts (channels in blocks of 16) for its direct kernels, and each call
 * reorders recoup's plain NCHW/OIHW tensors into them and the results back,
 * in workspace buffers. The primitives and reorders of one node are made
 * once and kept in the plan's state for the node; oneDNN's scratchpad is
 * taken from the op workspace too (user scratchpad mode), so a step
 * allocates nothing of recoup's. oneDNN runs on OpenMP, the runtime
 * recoup's own kernels use, and takes as many threads as
 * omp_get_max_threads() gives when it executes: recoup's thread setting
 * governs it. Only the CPU engine is ever made.
 *
 * oneDNN's backward primitives overwrite their outputs while recoup's
 * backward adds into gradients, so the input and weight gradients are
 * written to the workspace and added. The bias gradient is conv.c's. */
#include "ops/conv_impl.h"

#ifdef RECOUP_HAVE_DNNL

#include <string.h>

#include "ops/dnnl_kit.h"

#define ALIGN RC_DNNL_ALIGN
#define MAX_OPERANDS 4

/* One tensor of a convolution: the user's memory in recoup's plain layout
 * and, when the primitive chose another layout, its copy in that layout
 * (in the workspace) with the reorder between them. */
typedef struct dnnl_operand {
  int arg;    /* DNNL_ARG_... */
  int output; /* written by the convolution: reordered back after it */
  dnnl_memory_t user, inner;
  dnnl_primitive_t reorder; /* NULL when the layouts agree */
  size_t offset;            /* of inner's buffer in the step's workspace */
} dnnl_operand;

/* One primitive with its operands and scratchpad. */
typedef struct dnnl_step {
  dnnl_primitive_desc_t pd;
  dnnl_primitive_t prim;
  dnnl_operand ops[MAX_OPERANDS];
  int n_ops;
  dnnl_memory_t pad;
  size_t pad_offset, work_bytes; /* scratchpad's place, and all the step needs */
} dnnl_step;

/* Everything kept for one node: the shape it was made for, the engine and
 * stream, and the three primitives. */
typedef struct dnnl_conv {
  rc__conv_geom g;
  int has_bias;
  dnnl_engine_t engine;
  dnnl_stream_t stream;
  dnnl_memory_desc_t src_md, wei_md, bias_md, dst_md;
  dnnl_step fwd, bwd_data, bwd_weights;
  int refused; /* oneDNN refused this shape: not asked again */
} dnnl_conv;

/* What a convolution is described with: "any", letting oneDNN pick the
 * blocked layouts its direct kernels need, at the price of a reorder of
 * each tensor on every call; 0 would describe recoup's plain layouts, for
 * which oneDNN 2.6 falls back to im2col and its own GEMM (measured 3 to 10
 * times slower on ResNet-8's 3x3 layers; README's note on oneDNN). */
static const int let_library_choose_layouts = 1;


int rc__conv_dnnl_fits(const rc__conv_geom *g) {
  /* A 1x1 convolution is one GEMM on recoup's own path, and oneDNN's reorders
   * in and out made it slower there (0.45 to 0.9 of recoup's time on the
   * 1x1 layers of ResNet-8 and mobilenet_v2, batch 64, 2 threads). The
   * canonical axis 0 is the third spatial axis: size 1 for 1-D and 2-D. */
  return g->nsp <= 2 && g->p.img[0] == 1 && g->p.k[0] == 1 && g->K > 1 && !rc__conv_depthwise(g) && g->Cg > 0 &&
         g->Mg > 0;
}

static void step_release(dnnl_step *s) {
  for (int i = 0; i < s->n_ops; i++) {
    rc__dnnl_memory_drop(&s->ops[i].user);
    rc__dnnl_memory_drop(&s->ops[i].inner);
    if (s->ops[i].reorder) dnnl_primitive_destroy(s->ops[i].reorder);
  }
  rc__dnnl_memory_drop(&s->pad);
  if (s->prim) dnnl_primitive_destroy(s->prim);
  if (s->pd) dnnl_primitive_desc_destroy(s->pd);
  memset(s, 0, sizeof *s);
}

static void conv_release(dnnl_conv *c) {
  step_release(&c->fwd);
  step_release(&c->bwd_data);
  step_release(&c->bwd_weights);
  rc__dnnl_close(&c->engine, &c->stream);
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

static int ok(dnnl_status_t st) { return rc__dnnl_ok(st); }

/* Memory descriptors of the plain layouts. */
static int plain_layouts(dnnl_conv *c) {
  const rc__conv_geom *g = &c->g;
  dnnl_dims_t src = {g->N, g->C, g->p.img[1], g->p.img[2]}, dst = {g->N, g->M, g->p.pos[1], g->p.pos[2]};
  dnnl_dims_t wei = {g->G, g->Mg, g->Cg, g->p.k[1], g->p.k[2]}, bias = {g->M};
  if (g->G == 1) {
    dnnl_dims_t plain = {g->M, g->Cg, g->p.k[1], g->p.k[2]};
    if (!ok(dnnl_memory_desc_init_by_tag(&c->wei_md, 4, plain, dnnl_f32, dnnl_oihw))) return 0;
  } else if (!ok(dnnl_memory_desc_init_by_tag(&c->wei_md, 5, wei, dnnl_f32, dnnl_goihw))) {
    return 0;
  }
  return ok(dnnl_memory_desc_init_by_tag(&c->src_md, 4, src, dnnl_f32, dnnl_nchw)) &&
         ok(dnnl_memory_desc_init_by_tag(&c->dst_md, 4, dst, dnnl_f32, dnnl_nchw)) &&
         ok(dnnl_memory_desc_init_by_tag(&c->bias_md, 1, bias, dnnl_f32, dnnl_x));
}

/* The descriptor a convolution is described with for a plain one. */
static dnnl_memory_desc_t described(const dnnl_memory_desc_t *plain) {
  dnnl_memory_desc_t md = *plain;
  if (let_library_choose_layouts)
    dnnl_memory_desc_init_by_tag(&md, plain->ndims, plain->dims, dnnl_f32, dnnl_format_tag_any);
  return md;
}

/* An operand of step s: user memory in the plain layout, and when the
 * primitive chose another, the inner memory and the reorder. */
static int add_operand(dnnl_conv *c, dnnl_step *s, int arg, int output, const dnnl_memory_desc_t *plain) {
  dnnl_operand *o = &s->ops[s->n_ops++];
  o->arg = arg;
  o->output = output;
  if (!ok(dnnl_memory_create(&o->user, plain, c->engine, DNNL_MEMORY_NONE))) return 0;
  const dnnl_memory_desc_t *chosen = dnnl_primitive_desc_query_md(s->pd, dnnl_query_exec_arg_md, arg);
  if (!chosen || dnnl_memory_desc_equal(chosen, plain)) return 1;
  o->offset = s->work_bytes;
  s->work_bytes += rc__dnnl_round_up(dnnl_memory_desc_get_size(chosen));
  dnnl_primitive_desc_t rpd = NULL;
  int fine = ok(dnnl_memory_create(&o->inner, chosen, c->engine, DNNL_MEMORY_NONE)) &&
             ok(dnnl_reorder_primitive_desc_create(&rpd, output ? chosen : plain, c->engine,
                                                   output ? plain : chosen, c->engine, NULL)) &&
             ok(dnnl_primitive_create(&o->reorder, rpd));
  if (rpd) dnnl_primitive_desc_destroy(rpd);
  return fine;
}

/* The primitive of an operation descriptor, with a user scratchpad, and
 * its operands: (argument, written?, plain descriptor) triples. */
typedef struct operand_spec {
  int arg, output;
  const dnnl_memory_desc_t *plain;
} operand_spec;

static int make_step(dnnl_conv *c, dnnl_step *s, const void *desc, const_dnnl_primitive_desc_t hint,
                     const operand_spec *specs, int n) {
  dnnl_primitive_attr_t attr = NULL;
  if (!ok(dnnl_primitive_attr_create(&attr))) return 0;
  int fine = ok(dnnl_primitive_attr_set_scratchpad_mode(attr, dnnl_scratchpad_mode_user)) &&
             ok(dnnl_primitive_desc_create(&s->pd, desc, attr, c->engine, hint));
  dnnl_primitive_attr_destroy(attr);
  for (int i = 0; fine && i < n; i++) fine = add_operand(c, s, specs[i].arg, specs[i].output, specs[i].plain);
  if (!fine || !ok(dnnl_primitive_create(&s->prim, s->pd))) return 0;
  const dnnl_memory_desc_t *pad = dnnl_primitive_desc_query_md(s->pd, dnnl_query_scratchpad_md, 0);
  const size_t pad_bytes = pad ? dnnl_memory_desc_get_size(pad) : 0;
  s->pad_offset = s->work_bytes;
  s->work_bytes += rc__dnnl_round_up(pad_bytes);
  return !pad_bytes || ok(dnnl_memory_create(&s->pad, pad, c->engine, DNNL_MEMORY_NONE));
}

static int make_forward(dnnl_conv *c) {
  const dnnl_window w = window_of(&c->g);
  const dnnl_memory_desc_t src = described(&c->src_md), wei = described(&c->wei_md), dst = described(&c->dst_md);
  dnnl_convolution_desc_t d;
  const operand_spec specs[] = {{DNNL_ARG_SRC, 0, &c->src_md},
                                {DNNL_ARG_WEIGHTS, 0, &c->wei_md},
                                {DNNL_ARG_DST, 1, &c->dst_md},
                                {DNNL_ARG_BIAS, 0, &c->bias_md}};
  return ok(dnnl_dilated_convolution_forward_desc_init(&d, dnnl_forward_training, dnnl_convolution_direct, &src,
                                                       &wei, c->has_bias ? &c->bias_md : NULL, &dst, w.strides,
                                                       w.dilates, w.pad_l, w.pad_r)) &&
         make_step(c, &c->fwd, &d, NULL, specs, c->has_bias ? 4 : 3);
}

static int make_backward(dnnl_conv *c) {
  const dnnl_window w = window_of(&c->g);
  const dnnl_memory_desc_t src = described(&c->src_md), wei = described(&c->wei_md), dst = described(&c->dst_md);
  dnnl_convolution_desc_t dd, dw;
  const operand_spec data[] = {
      {DNNL_ARG_DIFF_DST, 0, &c->dst_md}, {DNNL_ARG_WEIGHTS, 0, &c->wei_md}, {DNNL_ARG_DIFF_SRC, 1, &c->src_md}};
  const operand_spec weights[] = {
      {DNNL_ARG_SRC, 0, &c->src_md}, {DNNL_ARG_DIFF_DST, 0, &c->dst_md}, {DNNL_ARG_DIFF_WEIGHTS, 1, &c->wei_md}};
  return ok(dnnl_dilated_convolution_backward_data_desc_init(&dd, dnnl_convolution_direct, &src, &wei, &dst,
                                                             w.strides, w.dilates, w.pad_l, w.pad_r)) &&
         make_step(c, &c->bwd_data, &dd, c->fwd.pd, data, 3) &&
         ok(dnnl_dilated_convolution_backward_weights_desc_init(&dw, dnnl_convolution_direct, &src, &wei, NULL,
                                                                &dst, w.strides, w.dilates, w.pad_l, w.pad_r)) &&
         make_step(c, &c->bwd_weights, &dw, c->fwd.pd, weights, 3);
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
    if (!rc__dnnl_open(&c->engine, &c->stream) || !plain_layouts(c)) return 0;
  }
  if (!c->fwd.prim && !make_forward(c)) return 0;
  return !backward || c->bwd_weights.prim || make_backward(c);
}

/* The node's kept primitives, made on first use; or, with no state to keep
 * them in, `local`, which the caller releases. NULL when oneDNN refuses. */
static dnnl_conv *conv_for(struct rc_op_state *state, dnnl_conv *local, const rc__conv_geom *g, int has_bias,
                           int backward) {
  dnnl_conv *c = local;
  memset(local, 0, sizeof *local);
  if (state && !(c = rc__dnnl_state_data(state, sizeof(dnnl_conv), state_release))) return NULL;
  if (prepare(c, g, has_bias, backward)) return c;
  conv_release(c);
  c->refused = 1;
  return NULL;
}

int rc__conv_dnnl_ready(const struct rc_op_state *state) {
  const dnnl_conv *c = state && state->release == state_release ? state->data : NULL;
  return c && c->fwd.prim;
}

static void finish(dnnl_conv *c, const dnnl_conv *local) {
  if (c == local) conv_release(c);
}

/* The input and weight gradients' plain copies, ahead of the steps' own
 * workspace in backward. */
static size_t dx_bytes(const rc__conv_geom *g) {
  return rc__dnnl_round_up(sizeof(float) * (size_t)(g->N * g->C * g->in_sp));
}
static size_t grads_bytes(const rc__conv_geom *g) {
  return dx_bytes(g) + rc__dnnl_round_up(sizeof(float) * (size_t)(g->M * g->Cg * g->K));
}

static size_t backward_bytes(const dnnl_conv *c) {
  const size_t a = c->bwd_data.work_bytes, b = c->bwd_weights.work_bytes;
  return grads_bytes(&c->g) + (a > b ? a : b);
}

size_t rc__conv_dnnl_workspace(struct rc_op_state *state, const rc__conv_geom *g, int has_bias, int backward) {
  dnnl_conv local, *c = conv_for(state, &local, g, has_bias, backward);
  if (!c) return 0;
  const size_t need = backward ? backward_bytes(c) : c->fwd.work_bytes;
  finish(c, &local);
  return need ? need : ALIGN;
}

/* Runs step s on the given data (one pointer per operand, in order) with
 * its workspace at work: inputs reordered in, the convolution, outputs
 * reordered out. */
static int run(dnnl_conv *c, dnnl_step *s, const void *const *data, char *work) {
  dnnl_exec_arg_t args[MAX_OPERANDS + 1];
  int n = 0;
  for (int i = 0; i < s->n_ops; i++) {
    dnnl_operand *o = &s->ops[i];
    if (!ok(dnnl_memory_set_data_handle(o->user, (void *)data[i]))) return 0;
    if (o->inner && !ok(dnnl_memory_set_data_handle(o->inner, work + o->offset))) return 0;
    if (o->reorder && !o->output) {
      dnnl_exec_arg_t io[2] = {{DNNL_ARG_FROM, o->user}, {DNNL_ARG_TO, o->inner}};
      if (!ok(dnnl_primitive_execute(o->reorder, c->stream, 2, io))) return 0;
    }
    args[n++] = (dnnl_exec_arg_t){o->arg, o->inner ? o->inner : o->user};
  }
  if (s->pad) {
    if (!ok(dnnl_memory_set_data_handle(s->pad, work + s->pad_offset))) return 0;
    args[n++] = (dnnl_exec_arg_t){DNNL_ARG_SCRATCHPAD, s->pad};
  }
  if (!ok(dnnl_primitive_execute(s->prim, c->stream, n, args))) return 0;
  for (int i = 0; i < s->n_ops; i++) {
    dnnl_operand *o = &s->ops[i];
    dnnl_exec_arg_t io[2] = {{DNNL_ARG_FROM, o->inner}, {DNNL_ARG_TO, o->user}};
    if (o->reorder && o->output && !ok(dnnl_primitive_execute(o->reorder, c->stream, 2, io))) return 0;
  }
  return ok(dnnl_stream_wait(c->stream));
}

int rc__conv_dnnl_forward(struct rc_op_state *state, const rc__conv_geom *g, float *y, const float *x,
                          const float *w, const float *b, void *work, size_t work_bytes) {
  dnnl_conv local, *c = conv_for(state, &local, g, b != NULL, 0);
  if (!c) return 0;
  const void *data[] = {x, w, y, b};
  const int done = work_bytes >= c->fwd.work_bytes && run(c, &c->fwd, data, work);
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
  float *tmp_dx = work, *tmp_dw = (float *)((char *)work + dx_bytes(g));
  char *steps = (char *)work + grads_bytes(g);
  int done = work_bytes >= backward_bytes(c);
  if (done && dx) done = run(c, &c->bwd_data, (const void *const[]){dy, w, tmp_dx}, steps);
  if (done && dw) done = run(c, &c->bwd_weights, (const void *const[]){x, dy, tmp_dw}, steps);
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
  (void)state, (void)g, (void)has_bias, (void)dx, (void)dw, (void)x, (void)w, (void)dy, (void)work,
      (void)work_bytes;
  return 0;
}

#endif
