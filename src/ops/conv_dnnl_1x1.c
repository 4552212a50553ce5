/* A 1x1 Conv (one group, stride 1, no padding) through one oneDNN batched
 * matmul over the whole batch instead of one OpenBLAS GEMM per sample.
 * Built only with RECOUP_HAVE_DNNL.
 *
 * In NCHW a 1x1 convolution of sample n is Y[n] (M x P) = W (M x C) . X[n]
 * (C x P), P the spatial cells: a matmul whose first operand, W, is
 * broadcast over the batch. Its input gradient is dX[n] = W^T . dY[n], with
 * W^T described through strides (no copy) and oneDNN's "sum" post-op
 * adding into dx, as recoup's backward adds into gradients. The weight
 * gradient sums over the batch, which a batched matmul cannot: it stays on
 * conv.c's OpenBLAS path. The bias is conv.c's too.
 *
 * The primitives of one node are made once and kept in the plan's state
 * for the node, as conv_dnnl.c keeps its convolutions (same lifetime,
 * out_of_memory flag, user scratchpad from the op workspace, threads from
 * omp_get_max_threads() when it runs). */
#include "ops/conv_impl.h"

/* Where the matmul pays, pass by pass. Measured on single kernels, batch
 * 64, one thread, min of 30 calls (machine shared, load about 4), oneDNN
 * 2.6 choosing brg:avx512_core, against what recoup runs otherwise (one
 * OpenBLAS GEMM per sample from 4x4 maps up, the chunked GEMMs of
 * conv_batch.c below), time ratios recoup/matmul on mobilenet_v2's 1x1
 * shapes (width 0.5, 64x64 input):
 *   maps 16x16..4x4 (16->96, 96->16, 32->192, 192->32, 48->288, 288->48):
 *     forward 2.2-2.6x, input gradient 1.4-2.2x;
 *   32x32 (8->48, 48->8): forward 1.30x and 0.88x, input gradient 1.27x
 *     and 0.44x;
 *   2x2: forward 2.56x (480->80), 1.52x (480->160), 1.00x (80->480), 0.71x
 *     (160->1280); input gradient 1.79x, 1.07x, 0.73x, 0.50x.
 * Hence: maps of 16 to 1023 cells take both passes; smaller maps take the
 * forward where the layer narrows (M <= C) and the input gradient where it
 * narrows by 4 or more (C >= 4M); maps of 32x32 and more keep recoup's
 * GEMMs. */
#define MM_CELLS_FROM 16
#define MM_CELLS_BELOW 1024

int rc__conv_mm_fits(const rc__conv_geom *g) {
  return g->direct && g->G == 1 && g->C > 0 && g->M > 0 && g->N > 0 && g->out_sp > 0;
}

int rc__conv_mm_pays(const rc__conv_geom *g, int data_grad) {
  if (g->out_sp >= MM_CELLS_BELOW) return 0;
  if (g->out_sp >= MM_CELLS_FROM) return 1;
  return data_grad ? g->C >= 4 * g->M : g->M <= g->C;
}

#ifdef RECOUP_HAVE_DNNL

#include <string.h>

#include "ops/dnnl_kit.h"

/* One matmul: c = a . b (batched, a broadcast), with its scratchpad. */
typedef struct mm_step {
  dnnl_primitive_desc_t pd;
  dnnl_primitive_t prim;
  dnnl_memory_t a, b, c, pad;
  size_t pad_bytes;
} mm_step;

/* Everything kept for one node: the shape it was made for, the engine and
 * stream, forward and input-gradient matmuls. */
typedef struct conv_mm {
  rc__conv_geom g;
  dnnl_engine_t engine;
  dnnl_stream_t stream;
  mm_step fwd, bwd_data;
  int refused; /* oneDNN refused this shape (or offered only its reference code) */
} conv_mm;

static void step_release(mm_step *s) {
  rc__dnnl_memory_drop(&s->a);
  rc__dnnl_memory_drop(&s->b);
  rc__dnnl_memory_drop(&s->c);
  rc__dnnl_memory_drop(&s->pad);
  if (s->prim) dnnl_primitive_destroy(s->prim);
  if (s->pd) dnnl_primitive_desc_destroy(s->pd);
  memset(s, 0, sizeof *s);
}

static void mm_release(conv_mm *c) {
  step_release(&c->fwd);
  step_release(&c->bwd_data);
  rc__dnnl_close(&c->engine, &c->stream);
}

static void state_release(void *data) {
  if (!data) return;
  mm_release(data);
  rc__free(data);
}

/* A (rows x cols) matrix shared by the batch, row r at stride rs and
 * column at stride cs: W itself, or W^T through swapped strides. */
static int shared_matrix(dnnl_memory_desc_t *md, int64_t rows, int64_t cols, int64_t rs, int64_t cs) {
  dnnl_dims_t dims = {1, rows, cols}, strides = {rows * cols, rs, cs};
  return rc__dnnl_ok(dnnl_memory_desc_init_by_strides(md, 3, dims, dnnl_f32, strides));
}

static int batch_matrix(dnnl_memory_desc_t *md, int64_t n, int64_t rows, int64_t cols) {
  dnnl_dims_t dims = {n, rows, cols};
  return rc__dnnl_ok(dnnl_memory_desc_init_by_tag(md, 3, dims, dnnl_f32, dnnl_abc));
}

/* oneDNN's reference matmul is far slower than recoup's GEMMs: a shape that
 * only it takes stays on recoup's path. */
static int optimised(const_dnnl_primitive_desc_t pd) {
  const char *impl = NULL;
  return rc__dnnl_ok(dnnl_primitive_desc_query(pd, dnnl_query_impl_info_str, 0, &impl)) && impl && strncmp(impl, "ref", 3);
}

/* The matmul c = a . b with a user scratchpad; `accumulate` adds into c. */
static int make_step(conv_mm *c, mm_step *s, const dnnl_memory_desc_t *a, const dnnl_memory_desc_t *b,
                     const dnnl_memory_desc_t *out, int accumulate) {
  dnnl_matmul_desc_t d;
  dnnl_primitive_attr_t attr = NULL;
  dnnl_post_ops_t po = NULL;
  if (!rc__dnnl_ok(dnnl_matmul_desc_init(&d, a, b, NULL, out)) || !rc__dnnl_ok(dnnl_primitive_attr_create(&attr))) return 0;
  int fine = rc__dnnl_ok(dnnl_primitive_attr_set_scratchpad_mode(attr, dnnl_scratchpad_mode_user));
  if (fine && accumulate)
    fine = rc__dnnl_ok(dnnl_post_ops_create(&po)) && rc__dnnl_ok(dnnl_post_ops_append_sum(po, 1.0f)) &&
           rc__dnnl_ok(dnnl_primitive_attr_set_post_ops(attr, po));
  fine = fine && rc__dnnl_ok(dnnl_primitive_desc_create(&s->pd, &d, attr, c->engine, NULL));
  if (po) dnnl_post_ops_destroy(po);
  dnnl_primitive_attr_destroy(attr);
  if (!fine || !optimised(s->pd) || !rc__dnnl_ok(dnnl_primitive_create(&s->prim, s->pd))) return 0;
  const dnnl_memory_desc_t *pad = dnnl_primitive_desc_query_md(s->pd, dnnl_query_scratchpad_md, 0);
  s->pad_bytes = pad ? dnnl_memory_desc_get_size(pad) : 0;
  return rc__dnnl_ok(dnnl_memory_create(&s->a, a, c->engine, DNNL_MEMORY_NONE)) &&
         rc__dnnl_ok(dnnl_memory_create(&s->b, b, c->engine, DNNL_MEMORY_NONE)) &&
         rc__dnnl_ok(dnnl_memory_create(&s->c, out, c->engine, DNNL_MEMORY_NONE)) &&
         (!s->pad_bytes || rc__dnnl_ok(dnnl_memory_create(&s->pad, pad, c->engine, DNNL_MEMORY_NONE)));
}

/* Y (N, M, P) = W (M, C) . X (N, C, P). */
static int make_forward(conv_mm *c) {
  const rc__conv_geom *g = &c->g;
  dnnl_memory_desc_t w, x, y;
  return shared_matrix(&w, g->M, g->C, g->C, 1) && batch_matrix(&x, g->N, g->C, g->out_sp) &&
         batch_matrix(&y, g->N, g->M, g->out_sp) && make_step(c, &c->fwd, &w, &x, &y, 0);
}

/* dX (N, C, P) += W^T (C, M) . dY (N, M, P); W^T is W read column-wise. */
static int make_backward(conv_mm *c) {
  const rc__conv_geom *g = &c->g;
  dnnl_memory_desc_t wt, dy, dx;
  return shared_matrix(&wt, g->C, g->M, 1, g->C) && batch_matrix(&dy, g->N, g->M, g->out_sp) &&
         batch_matrix(&dx, g->N, g->C, g->out_sp) && make_step(c, &c->bwd_data, &wt, &dy, &dx, 1);
}

static int same_geometry(const rc__conv_geom *a, const rc__conv_geom *b) {
  return a->N == b->N && a->C == b->C && a->M == b->M && a->out_sp == b->out_sp;
}

/* Makes the matmul of one pass (0 forward, 1 input gradient) for this
 * shape, keeping what c already has when it was made for the same shape.
 * Returns 0 when oneDNN refuses. */
static int prepare(conv_mm *c, const rc__conv_geom *g, int which_pass) {
  const int same = same_geometry(&c->g, g);
  if (same && c->refused) return 0;
  if ((c->engine || c->refused) && !same) {
    mm_release(c);
    c->refused = 0;
  }
  if (!c->engine) {
    c->g = *g;
    if (!rc__dnnl_open(&c->engine, &c->stream)) return 0;
  }
  if (!which_pass) return c->fwd.prim || make_forward(c);
  return c->bwd_data.prim || make_backward(c);
}

/* The node's kept primitives, made on first use; or, with no state to keep
 * them in, `local`, which the caller releases. NULL when oneDNN refuses. */
static conv_mm *mm_for(struct rc_op_state *state, conv_mm *local, const rc__conv_geom *g, int which_pass) {
  conv_mm *c = local;
  memset(local, 0, sizeof *local);
  if (state && !(c = rc__dnnl_state_data(state, sizeof(conv_mm), state_release))) return NULL;
  if (prepare(c, g, which_pass)) return c;
  mm_release(c);
  c->refused = 1;
  return NULL;
}

static void finish(conv_mm *c, const conv_mm *local) {
  if (c == local) mm_release(c);
}

int rc__conv_mm_ready(const struct rc_op_state *state) {
  const conv_mm *c = state && state->release == state_release ? state->data : NULL;
  return c && (c->fwd.prim || c->bwd_data.prim);
}

size_t rc__conv_mm_workspace(struct rc_op_state *state, const rc__conv_geom *g, int which_pass) {
  conv_mm local, *c = mm_for(state, &local, g, which_pass);
  if (!c) return 0;
  const size_t need = rc__dnnl_round_up(which_pass ? c->bwd_data.pad_bytes : c->fwd.pad_bytes);
  finish(c, &local);
  return need ? need : RC_DNNL_ALIGN;
}

/* c = a . b (or c += a . b) on the given data, scratchpad at work. */
static int run(conv_mm *c, mm_step *s, const float *a, const float *b, float *out, void *work, size_t work_bytes) {
  if (work_bytes < s->pad_bytes) return 0;
  if (!rc__dnnl_ok(dnnl_memory_set_data_handle(s->a, (void *)a)) || !rc__dnnl_ok(dnnl_memory_set_data_handle(s->b, (void *)b)) ||
      !rc__dnnl_ok(dnnl_memory_set_data_handle(s->c, out)))
    return 0;
  dnnl_exec_arg_t args[4] = {{DNNL_ARG_SRC, s->a}, {DNNL_ARG_WEIGHTS, s->b}, {DNNL_ARG_DST, s->c}};
  int n = 3;
  if (s->pad) {
    if (!rc__dnnl_ok(dnnl_memory_set_data_handle(s->pad, work))) return 0;
    args[n++] = (dnnl_exec_arg_t){DNNL_ARG_SCRATCHPAD, s->pad};
  }
  return rc__dnnl_ok(dnnl_primitive_execute(s->prim, c->stream, n, args)) && rc__dnnl_ok(dnnl_stream_wait(c->stream));
}

int rc__conv_mm_forward(struct rc_op_state *state, const rc__conv_geom *g, float *y, const float *x, const float *w,
                        void *work, size_t work_bytes) {
  conv_mm local, *c = mm_for(state, &local, g, 0);
  if (!c) return 0;
  const int done = run(c, &c->fwd, w, x, y, work, work_bytes);
  finish(c, &local);
  return done;
}

int rc__conv_mm_backward_data(struct rc_op_state *state, const rc__conv_geom *g, float *dx, const float *w,
                              const float *dy, void *work, size_t work_bytes) {
  conv_mm local, *c = mm_for(state, &local, g, 1);
  if (!c) return 0;
  /* run fails only on arguments refused before oneDNN starts: dx is then
   * untouched and left for the caller's other path. */
  const int done = run(c, &c->bwd_data, w, dy, dx, work, work_bytes);
  finish(c, &local);
  return done;
}

#else

int rc__conv_mm_ready(const struct rc_op_state *state) {
  (void)state;
  return 0;
}

size_t rc__conv_mm_workspace(struct rc_op_state *state, const rc__conv_geom *g, int which_pass) {
  (void)state, (void)g, (void)which_pass;
  return 0;
}

int rc__conv_mm_forward(struct rc_op_state *state, const rc__conv_geom *g, float *y, const float *x, const float *w,
                        void *work, size_t work_bytes) {
  (void)state, (void)g, (void)y, (void)x, (void)w, (void)work, (void)work_bytes;
  return 0;
}

int rc__conv_mm_backward_data(struct rc_op_state *state, const rc__conv_geom *g, float *dx, const float *w,
                              const float *dy, void *work, size_t work_bytes) {
  (void)state, (void)g, (void)dx, (void)w, (void)dy, (void)work, (void)work_bytes;
  return 0;
}

#endif
