/* The N:M kernels of Conv (src/ops/nm_conv.c, nm_kernels.c) against the
 * dense paths of the same op, forward and both gradients: N:M masks as
 * `recoup prune --pattern N:M` makes them (the n of largest magnitude kept
 * in every group of m consecutive input channels at each kernel cell;
 * src/compress/prune_sparsity.c), on odd map sizes (strips of 64 columns
 * with tails), padding, strides, dilations, 1-D, 1x1 and batch 1. The dense
 * paths are the ones test_ops_conv and test_ops_conv_ref check against the
 * ONNX specification and PyTorch; test_ops_sparse_ref checks the N:M
 * kernels against PyTorch directly.
 *
 * Tolerances (the kernels add in another order than the GEMMs): forward
 * within 1e-5 * (1 + |dense|), gradients within 1e-4 * (1 + |dense|).
 * Exact checks: the weight gradient at frozen positions keeps the value the
 * buffer held before backward; every instruction set level gives the same
 * bits; one and two threads give the same output and input gradient (the
 * weight gradient is summed per thread, as on the dense path). Where the
 * N:M structure is missing (channels not a multiple of m, as the pruner
 * then leaves the layer dense; more than half kept) or the Conv is grouped,
 * no N:M format is made or the dense path serves. */
#define _POSIX_C_SOURCE 200112L
#include <omp.h>
#include <stdlib.h>

#include "ops/conv_impl.h"
#include "ops/nm.h"
#include "ops/sparse.h"
#include "ops_check.h"

typedef struct nm_case {
  const char *name;
  int64_t n, cin, cout, group;
  int nsp;
  int64_t in[2], k[2], s[2], d[2], pads[4];
  int bias, keep_n, keep_m;
} nm_case;

static int64_t weight_numel(const nm_case *sc, int64_t *cells) {
  *cells = 1;
  for (int i = 0; i < sc->nsp; i++) *cells *= sc->k[i];
  return sc->cout * (sc->cin / sc->group) * *cells;
}

/* keep the n of largest |w| of every m channels at each cell (ties: lower
 * channel), as rc__prune_keep_n_of_m does; pruned weights become zero. */
static void nm_mask(float *w, uint8_t *keep, int64_t rows, int64_t channels, int64_t cells, int n, int m) {
  for (int64_t r = 0; r < rows; r++)
    for (int64_t c0 = 0; c0 < channels; c0 += m)
      for (int64_t t = 0; t < cells; t++)
        for (int k = 0; k < m; k++) {
          const int64_t at = (r * channels + c0 + k) * cells + t;
          int beaten = 0;
          for (int j = 0; j < m; j++) {
            const float b = fabsf(w[(r * channels + c0 + j) * cells + t]), a = fabsf(w[at]);
            beaten += b > a || (b == a && j < k);
          }
          keep[at] = beaten < n;
          if (!keep[at]) w[at] = 0.0f;
        }
}

static void add_inputs(oh_case *c, const nm_case *sc, const float *w) {
  int64_t wd[4] = {sc->cout, sc->cin / sc->group}, xd[4] = {sc->n, sc->cin};
  for (int i = 0; i < sc->nsp; i++) wd[2 + i] = sc->k[i], xd[2 + i] = sc->in[i];
  int64_t nx = 1;
  for (int i = 0; i < 2 + sc->nsp; i++) nx *= xd[i];
  float *x = malloc(sizeof(float) * (size_t)nx), b[256];
  oh_fill(x, nx, 101);
  oh_fill(b, sc->cout, 303);
  oh_input(c, RC_DTYPE_FLOAT, 2 + sc->nsp, xd, x);
  oh_input(c, RC_DTYPE_FLOAT, 2 + sc->nsp, wd, w);
  if (sc->bias) oh_input(c, RC_DTYPE_FLOAT, 1, (int64_t[]){sc->cout}, b);
  free(x);
  if (sc->group > 1) oh_attr_int(c, "group", sc->group);
  if (sc->s[0]) oh_attr_ints(c, "strides", sc->nsp, sc->s);
  if (sc->d[0]) oh_attr_ints(c, "dilations", sc->nsp, sc->d);
  oh_attr_ints(c, "pads", 2 * sc->nsp, sc->pads);
}

/* Forward and backward with the pattern of keep (and its N:M format) or
 * without (dense), on `threads` threads at instruction set `isa` (NULL:
 * the machine's best). Returns whether an N:M format was made in *has_nm. */
static int run_op(const nm_case *sc, const float *w, const uint8_t *keep, int threads, const char *isa, run_out *r,
                  int *has_nm) {
  oh_case c;
  oh_init(&c, "Conv", 17);
  add_inputs(&c, sc, w);
  rc__wpattern pat;
  if (keep) {
    const rc_tensor *wt = &c.in_t[1];
    const int64_t numel = rc_tensor_numel(wt);
    rc_err e = {0};
    CHECK_STATUS(rc__wpattern_build(&pat, &c.arena, keep, wt->dims[0], numel / wt->dims[0], &e), RC_OK);
    CHECK_STATUS(rc__nm_attach(&pat, &c.arena, keep, numel / (wt->dims[0] * wt->dims[1]), &e), RC_OK);
    c.pattern = &pat;
    if (has_nm) *has_nm = pat.nm != NULL;
  }
  if (isa) setenv("RECOUP_KERNEL_ISA", isa, 1);
  omp_set_num_threads(threads);
  const int ok = run_and_keep(&c, c.node.n_in, r);
  omp_set_num_threads(2);
  unsetenv("RECOUP_KERNEL_ISA");
  oh_free(&c);
  return ok;
}

static const char *const what[4] = {"y", "dX", "dW", "dB"};

/* expect_nm: an N:M format is made; serves: the N:M kernels then run. */
static void one_case(const nm_case *sc, int expect_nm, int serves) {
  char label[96];
  snprintf(label, sizeof label, "%s %d:%d", sc->name, sc->keep_n, sc->keep_m);
  int64_t cells;
  const int64_t nw = weight_numel(sc, &cells), channels = sc->cin / sc->group;
  float *w = malloc(sizeof(float) * (size_t)nw), *seed_dw = malloc(sizeof(float) * (size_t)nw);
  uint8_t *keep = malloc((size_t)nw);
  oh_fill(w, nw, 202);
  if (channels % sc->keep_m == 0)
    nm_mask(w, keep, sc->cout, channels, cells, sc->keep_n, sc->keep_m);
  else
    memset(keep, 1, (size_t)nw); /* the pruner leaves such a layer dense */
  run_out dense, nm, nm1, isa[2];
  int has_nm = 0;
  setenv("RECOUP_CONV_PATH", "nm-on", 1);
  CHECK(run_op(sc, w, NULL, 2, NULL, &dense, NULL));
  CHECK(run_op(sc, w, keep, 2, NULL, &nm, &has_nm));
  CHECK(run_op(sc, w, keep, 1, NULL, &nm1, NULL));
  CHECK(run_op(sc, w, keep, 2, "avx2", &isa[0], NULL));
  CHECK(run_op(sc, w, keep, 2, "baseline", &isa[1], NULL));
  unsetenv("RECOUP_CONV_PATH");
  printf("%-26s N:M format %s (expected %s)\n", label, has_nm ? "made" : "not made",
         expect_nm ? "made" : "not made");
  CHECK_EQ(has_nm, expect_nm);
  oh_fill(seed_dw, nw, 506);
  for (int i = 0; i < 4; i++) {
    if (!dense.v[i]) continue;
    CHECK_EQ(nm.n[i], dense.n[i]);
    const double tol = i ? 1e-4 : 1e-5;
    CHECK_EQ(
        compare_paths(label, what[i], "N:M", "dense", nm.v[i], dense.v[i], dense.n[i], tol, i == 2 ? keep : NULL),
        0);
    for (int j = 0; j < 2; j++) CHECK_MEM_EQ(isa[j].v[i], nm.v[i], sizeof(float) * (size_t)dense.n[i]);
    if (i == 2)
      CHECK_EQ(compare_paths(label, what[i], "1 thread", "2 threads", nm1.v[i], nm.v[i], nm.n[i], 1e-5, keep), 0);
    else
      CHECK_MEM_EQ(nm1.v[i], nm.v[i], sizeof(float) * (size_t)dense.n[i]);
  }
  int64_t touched = 0, frozen = 0;
  for (int64_t j = 0; j < nw; j++)
    if (!keep[j]) {
      frozen++;
      if (memcmp(&nm.v[2][j], &seed_dw[j], sizeof(float))) touched++;
    }
  printf("%-26s dW  %lld frozen positions, %lld touched%s\n", label, (long long)frozen, (long long)touched,
         serves ? "" : " (dense path: all written)");
  if (serves) CHECK_EQ(touched, 0);
  /* A layer the N:M kernels serve gets none of the 1x1 matmul's primitives
   * (conv_dnnl_1x1.c), which the dense run may keep. */
  printf("%-26s 1x1 matmul kept: dense %d, N:M %d%s\n", label, dense.mm_kept, nm.mm_kept,
         serves ? " (expected 0)" : "");
  if (serves) CHECK_INT(nm.mm_kept, 0);
  run_out_free(&dense);
  run_out_free(&nm);
  run_out_free(&nm1);
  run_out_free(&isa[0]);
  run_out_free(&isa[1]);
  free(seed_dw);
  free(w);
  free(keep);
}

static void nm_matches_dense(void) {
  const nm_case cases[] = {
      /* name                 n  cin cout grp nsp in        k       s       d       pads          bias N  M */
      {"3x3 pad 1", 3, 8, 7, 1, 2, {9, 11}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 2, 4},
      {"3x3 batch 1", 1, 12, 5, 1, 2, {10, 9}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 0, 2, 4},
      {"stride dilation", 2, 8, 6, 1, 2, {13, 12}, {3, 2}, {2, 1}, {1, 2}, {1, 0, 2, 1}, 1, 2, 4},
      {"16ch 12x12", 2, 16, 16, 1, 2, {12, 12}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 2, 4},
      {"dilation, uneven pads", 2, 8, 6, 1, 2, {10, 13}, {3, 3}, {1, 1}, {2, 1}, {2, 0, 1, 2}, 1, 2, 4},
      {"5x3 no pads", 2, 12, 5, 1, 2, {9, 11}, {5, 3}, {0}, {0}, {0, 0, 0, 0}, 0, 2, 4},
      {"1x1 direct", 3, 16, 10, 1, 2, {9, 8}, {1, 1}, {0}, {0}, {0, 0, 0, 0}, 1, 2, 4},
      {"1x1 stride 2", 2, 8, 5, 1, 2, {15, 14}, {1, 1}, {2, 2}, {0}, {0, 0, 0, 0}, 1, 2, 4},
      {"1-D", 2, 8, 5, 1, 1, {70}, {3}, {1}, {0}, {1, 1}, 1, 4, 8},
      {"1x1 1:4", 2, 8, 9, 1, 2, {8, 10}, {1, 1}, {0}, {0}, {0, 0, 0, 0}, 0, 1, 4},
  };
  for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
    const int before = test_failed_checks_;
    one_case(&cases[i], 1, 1);
    if (test_failed_checks_ != before) fprintf(stderr, "FAIL case %s\n", cases[i].name);
  }
}

/* No N:M format, or a grouped Conv: the dense path serves, same results. */
static void without_structure(void) {
  const nm_case cases[] = {
      {"6 channels (left dense)", 2, 6, 4, 1, 2, {7, 6}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 2, 4},
      {"3 of 4 kept", 2, 8, 4, 1, 2, {7, 6}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 3, 4},
  };
  for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) one_case(&cases[i], 0, 0);
  /* Groups: the format is made (per-row structure holds) but the Conv does not take it. */
  const nm_case grouped = {"groups 2", 2, 8, 6, 2, 2, {7, 6}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 2, 4};
  one_case(&grouped, 1, 0);
  rc__conv_geom g = {.G = 2, .Cg = 4, .Mg = 3, .M = 6, .K = 9};
  rc__nm f = {.cells = 9};
  rc__wpattern p = {.rows = 6, .cols = 36, .nm = &f};
  CHECK(!rc__nm_conv_fits(&g, &p));
  g.G = 1, g.Cg = 8;
  p.cols = 72;
  CHECK(rc__nm_conv_fits(&g, &p));
}

int main(void) {
  unsetenv("RECOUP_CONV_PATH");
  RUN(nm_matches_dense);
  RUN(without_structure);
  return TEST_REPORT();
}
