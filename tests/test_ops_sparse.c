/* The sparse kernels of Conv, Gemm and MatMul (src/ops/sparse_conv.c,
 * sparse_gemm.c) against the dense paths of the same ops, forward and both
 * gradients, on odd sizes, padding, strides, dilations, groups and batch 1,
 * with 50%, 80% and 95% of the weights pruned at random, a 2:4 pattern
 * (two kept of every four consecutive weights, the larger two), and an
 * output channel with every weight pruned. The dense paths are the ones
 * test_ops_conv, test_ops_matmul and test_ops_conv_ref check against the
 * ONNX specification, finite differences and PyTorch; test_ops_sparse_ref
 * checks the sparse kernels against PyTorch directly.
 *
 * Tolerances (the sparse kernels add in another order than the GEMMs):
 * forward within 1e-5 * (1 + |dense|), gradients within 1e-4 * (1 + |dense|).
 * Exact checks: the weight gradient at frozen positions keeps the value the
 * buffer held before backward (no work and no write there), and one and two
 * threads give the same bytes. */
#define _POSIX_C_SOURCE 200112L
#include <omp.h>
#include <stdlib.h>

#include "ops/sparse.h"
#include "ops_check.h"

/* How the weight is pruned: the fraction pruned at random, or 2:4. */
typedef struct prune_kind {
  const char *name;
  double pruned; /* < 0: 2 kept of every 4 consecutive weights */
  int empty_row; /* every weight of output row 1 pruned too */
} prune_kind;

static const prune_kind kinds[] = {
    {"50%", 0.5, 0}, {"80%", 0.8, 0}, {"95%", 0.95, 0}, {"2:4", -1, 0}, {"80%+empty", 0.8, 1},
};

/* keep[i] for a weight of rows x cols; the pruned weights of w become zero. */
static void make_mask(const prune_kind *pk, float *w, uint8_t *keep, int64_t rows, int64_t cols, uint32_t seed) {
  const int64_t n = rows * cols;
  for (int64_t i = 0; i < n; i++) {
    seed = seed * 1664525u + 1013904223u;
    keep[i] = pk->pruned < 0 || (seed >> 8) / 16777216.0 >= pk->pruned;
  }
  if (pk->pruned < 0)
    for (int64_t g = 0; g < n; g += 4) {
      /* prune the two smallest magnitudes of the group (fewer in a short tail) */
      const int64_t len = n - g < 4 ? n - g : 4;
      for (int drop = 0; drop < len / 2; drop++) {
        int64_t at = -1;
        for (int64_t i = g; i < g + len; i++)
          if (keep[i] && (at < 0 || fabsf(w[i]) < fabsf(w[at]))) at = i;
        keep[at] = 0;
      }
    }
  if (pk->empty_row && rows > 1)
    for (int64_t c = 0; c < cols; c++) keep[cols + c] = 0;
  for (int64_t i = 0; i < n; i++)
    if (!keep[i]) w[i] = 0.0f;
}

typedef enum op_kind { OP_CONV, OP_GEMM, OP_MATMUL } op_kind;

typedef struct sp_case {
  const char *name;
  op_kind op;
  /* Conv: x (n, cin, in...), W (cout, cin/group, k...). Gemm: A (n, cin),
   * B (cout, cin) with trans_b or (cin, cout) without. MatMul: A (n, 3, cin), B (cin, cout). */
  int64_t n, cin, cout, group;
  int nsp;
  int64_t in[2], k[2], s[2], d[2], pads[4];
  int bias, trans_b;
  float alpha, beta;
} sp_case;

/* Weight shape of a case: dims, rank. */
static int weight_dims(const sp_case *sc, int64_t *wd) {
  if (sc->op == OP_CONV) {
    wd[0] = sc->cout;
    wd[1] = sc->cin / sc->group;
    for (int i = 0; i < sc->nsp; i++) wd[2 + i] = sc->k[i];
    return 2 + sc->nsp;
  }
  wd[0] = sc->op == OP_GEMM && sc->trans_b ? sc->cout : sc->cin;
  wd[1] = sc->op == OP_GEMM && sc->trans_b ? sc->cin : sc->cout;
  return 2;
}

static void add_inputs(oh_case *c, const sp_case *sc, const float *w) {
  int64_t wd[4];
  const int wr = weight_dims(sc, wd);
  int64_t xd[4] = {sc->n, sc->cin}, xr = 2;
  if (sc->op == OP_CONV)
    for (int i = 0; i < sc->nsp; i++) xd[xr++] = sc->in[i];
  if (sc->op == OP_MATMUL) xd[1] = 3, xd[2] = sc->cin, xr = 3;
  int64_t nx = 1;
  for (int i = 0; i < xr; i++) nx *= xd[i];
  float *x = malloc(sizeof(float) * (size_t)nx), b[256];
  oh_fill(x, nx, 101);
  oh_fill(b, sc->cout, 303);
  oh_input(c, RC_DTYPE_FLOAT, (int)xr, xd, x);
  oh_input(c, RC_DTYPE_FLOAT, wr, wd, w);
  if (sc->bias) oh_input(c, RC_DTYPE_FLOAT, 1, (int64_t[]){sc->cout}, b);
  free(x);
  if (sc->op == OP_GEMM) {
    if (sc->trans_b) oh_attr_int(c, "transB", 1);
    oh_attr_float(c, "alpha", sc->alpha);
    oh_attr_float(c, "beta", sc->beta);
  }
  if (sc->op != OP_CONV) return;
  if (sc->group > 1) oh_attr_int(c, "group", sc->group);
  if (sc->s[0]) oh_attr_ints(c, "strides", sc->nsp, sc->s);
  if (sc->d[0]) oh_attr_ints(c, "dilations", sc->nsp, sc->d);
  oh_attr_ints(c, "pads", 2 * sc->nsp, sc->pads);
}

/* Runs forward and backward (dy from a fixed seed) with or without the
 * pattern of keep on `threads` threads. Gradient buffers start from fixed
 * non-zero values, so "adds into" and "untouched" are checked too. */
static int run_op(const sp_case *sc, const float *w, const uint8_t *keep, int threads, run_out *r) {
  oh_case c;
  static const char *const ops[] = {"Conv", "Gemm", "MatMul"};
  oh_init(&c, ops[sc->op], 17);
  add_inputs(&c, sc, w);
  rc__wpattern pat;
  if (keep) {
    const rc_tensor *wt = &c.in_t[1];
    rc_err e = {0};
    CHECK_STATUS(rc__wpattern_build(&pat, &c.arena, keep, wt->dims[0], rc_tensor_numel(wt) / wt->dims[0], &e),
                 RC_OK);
    c.pattern = &pat;
  }
  omp_set_num_threads(threads);
  const int ok = run_and_keep(&c, c.node.n_in, r);
  omp_set_num_threads(2);
  oh_free(&c);
  return ok;
}

static const char *const what[4] = {"y", "dX", "dW", "dB/dC"};

static void one_case(const sp_case *sc, const prune_kind *pk) {
  char label[96];
  snprintf(label, sizeof label, "%s %s", sc->name, pk->name);
  int64_t wd[4], nw = 1;
  const int wr = weight_dims(sc, wd);
  for (int i = 0; i < wr; i++) nw *= wd[i];
  float *w = malloc(sizeof(float) * (size_t)nw);
  uint8_t *keep = malloc((size_t)nw);
  oh_fill(w, nw, 202);
  make_mask(pk, w, keep, wd[0], nw / wd[0], 77);
  run_out dense, sparse, sparse1;
  setenv("RECOUP_CONV_PATH", "sparse", 1);
  CHECK(run_op(sc, w, NULL, 2, &dense)); /* no pattern: the dense path */
  CHECK(run_op(sc, w, keep, 2, &sparse));
  CHECK(run_op(sc, w, keep, 1, &sparse1));
  unsetenv("RECOUP_CONV_PATH");
  float *seed_dw = malloc(sizeof(float) * (size_t)nw);
  oh_fill(seed_dw, nw, 506);
  for (int i = 0; i < 4; i++) {
    if (!dense.v[i]) continue;
    CHECK_EQ(sparse.n[i], dense.n[i]);
    const double tol = i ? 1e-4 : 1e-5;
    CHECK_EQ(compare_paths(label, what[i], "sparse", "dense", sparse.v[i], dense.v[i], dense.n[i], tol,
                           i == 2 ? keep : NULL),
             0);
    /* The thread count changes no bit. */
    CHECK_MEM_EQ(sparse1.v[i], sparse.v[i], sizeof(float) * (size_t)dense.n[i]);
  }
  /* Frozen positions of the weight gradient: exactly what the buffer held. */
  int64_t touched = 0, frozen = 0;
  for (int64_t j = 0; j < nw; j++)
    if (!keep[j]) {
      frozen++;
      if (memcmp(&sparse.v[2][j], &seed_dw[j], sizeof(float))) touched++;
    }
  printf("%-30s dW    %lld frozen positions, %lld touched\n", label, (long long)frozen, (long long)touched);
  CHECK_EQ(touched, 0);
  /* A layer the sparse kernels serve gets none of the 1x1 matmul's
   * primitives (conv_dnnl_1x1.c), which the dense run may keep. */
  printf("%-30s 1x1 matmul kept: dense %d, sparse %d (expected 0)\n", label, dense.mm_kept, sparse.mm_kept);
  CHECK_INT(sparse.mm_kept, 0);
  free(seed_dw);
  run_out_free(&dense);
  run_out_free(&sparse);
  run_out_free(&sparse1);
  free(w);
  free(keep);
}

static void sparse_matches_dense(void) {
  const sp_case cases[] = {
      /* name               op       n  cin cout grp nsp in       k       s       d       pads     bias tB alpha beta */
      {"conv 3x3 pad 1", OP_CONV, 3, 5, 7, 1, 2, {9, 7}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 0, 0, 0},
      {"conv 3x3 batch 1", OP_CONV, 1, 6, 4, 1, 2, {6, 5}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 0, 0, 0},
      {"conv stride dilation", OP_CONV, 3, 4, 6, 1, 2, {11, 9}, {3, 2}, {2, 1}, {1, 2}, {1, 0, 2, 1}, 1, 0, 0, 0},
      {"conv groups 2", OP_CONV, 3, 4, 6, 2, 2, {6, 7}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 0, 0, 0, 0},
      {"conv 1x1", OP_CONV, 5, 9, 11, 1, 2, {5, 3}, {1, 1}, {0}, {0}, {0, 0, 0, 0}, 1, 0, 0, 0},
      {"conv 1x1 7x7", OP_CONV, 3, 9, 11, 1, 2, {7, 7}, {1, 1}, {0}, {0}, {0, 0, 0, 0}, 0, 0, 0, 0},
      {"conv 1x1 stride 2", OP_CONV, 2, 6, 5, 1, 2, {7, 6}, {1, 1}, {2, 2}, {0}, {0, 0, 0, 0}, 1, 0, 0, 0},
      {"conv 1-D", OP_CONV, 4, 3, 5, 1, 1, {13}, {3}, {2}, {0}, {1, 2}, 1, 0, 0, 0},
      {"conv 16ch 8x8", OP_CONV, 4, 16, 16, 1, 2, {8, 8}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 0, 0, 0},
      {"gemm transB", OP_GEMM, 5, 23, 9, 1, 0, {0}, {0}, {0}, {0}, {0}, 1, 1, 1.0f, 1.0f},
      {"gemm alpha beta", OP_GEMM, 4, 13, 7, 1, 0, {0}, {0}, {0}, {0}, {0}, 1, 0, -2.0f, 0.5f},
      {"gemm no C batch 1", OP_GEMM, 1, 17, 6, 1, 0, {0}, {0}, {0}, {0}, {0}, 0, 1, 0.5f, 1.0f},
      {"matmul", OP_MATMUL, 2, 11, 7, 1, 0, {0}, {0}, {0}, {0}, {0}, 0, 0, 0, 0},
  };
  for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++)
    for (size_t j = 0; j < sizeof kinds / sizeof kinds[0]; j++) {
      const int before = test_failed_checks_;
      one_case(&cases[i], &kinds[j]);
      if (test_failed_checks_ != before) fprintf(stderr, "FAIL case %s %s\n", cases[i].name, kinds[j].name);
    }
}

/* The density threshold and RECOUP_CONV_PATH decide; "dense" and
 * "reference" turn the sparse kernels off whatever the density. */
static void choice_follows_density(void) {
  rc__wpattern lo = {.density = 0.01}, hi = {.density = 0.9};
  rc_kernel k = {0};
  unsetenv("RECOUP_CONV_PATH");
  k.pattern = &lo;
  CHECK_PTR_EQ(rc__sparse_pick(&k, rc__sparse_gemm_max_density), &lo);
  k.pattern = &hi;
  CHECK_NULL(rc__sparse_pick(&k, rc__sparse_gemm_max_density));
  setenv("RECOUP_CONV_PATH", "sparse", 1);
  CHECK_PTR_EQ(rc__sparse_pick(&k, rc__sparse_gemm_max_density), &hi);
  k.pattern = &lo;
  setenv("RECOUP_CONV_PATH", "dense", 1);
  CHECK_NULL(rc__sparse_pick(&k, rc__sparse_gemm_max_density));
  setenv("RECOUP_CONV_PATH", "reference", 1);
  CHECK_NULL(rc__sparse_pick(&k, rc__sparse_gemm_max_density));
  unsetenv("RECOUP_CONV_PATH");
  k.pattern = NULL;
  CHECK_NULL(rc__sparse_pick(&k, 1.0));
}

int main(void) {
  unsetenv("RECOUP_CONV_PATH");
  RUN(sparse_matches_dense);
  RUN(choice_follows_density);
  return TEST_REPORT();
}
