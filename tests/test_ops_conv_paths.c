/* Conv's fast paths against its plain per-sample path, forward and both
 * backward products: the batched GEMM path (1x1 and general convolutions,
 * several samples per GEMM, chunks with a remainder), the direct
 * depthwise kernels (short rows as one flat run, rows of 16 or more one by
 * one; input gradient straight into dx at stride 1, phase by phase otherwise)
 * and, in builds with oneDNN, its convolutions (RECOUP_CONV_PATH=dnnl;
 * channels in blocks of 16 take its reordered blocked layouts) and its
 * batched matmul for 1x1 layers (conv_dnnl_1x1.c; "dnnl" sends every map
 * size there, the default only maps below 32x32), each run
 * also through a kept state as a plan keeps it,
 * on odd sizes, padding, strides, dilations, groups and batch 1, at every
 * instruction-set level this CPU has (RECOUP_KERNEL_ISA lowers it). The
 * plain path is the one test_ops_conv checks against the ONNX specification
 * and finite differences, and test_ops_conv_ref against PyTorch.
 *
 * Tolerances: the batched GEMMs sum in another order than the per-sample
 * ones, so those compare within 1e-5 * (1 + |value|) (forward) and
 * 1e-4 * (1 + |value|) (gradients, sums over the batch). The depthwise
 * forward and input gradient add in the plain path's order and must agree
 * exactly; its weight gradient sums in 16 lanes, within 1e-4. With several
 * output channels per group (a channel multiplier) the plain path is the
 * GEMMs: the batched tolerances. Instruction
 * sets must agree bit for bit (no contraction into multiply-add, fixed lane
 * order). */
#define _POSIX_C_SOURCE 200112L
#include <stdlib.h>

#include "ops/conv_impl.h"
#include "ops/kernel_choice.h"
#include "ops_check.h"

typedef struct path_case {
  const char *name;
  int64_t n, cin, cout, group;
  int nsp;
  int64_t in[2], k[2], s[2], d[2], pads[4];
  int bias;
  int depthwise; /* the direct depthwise kernels serve it */
} path_case;

/* Runs forward and backward (dy drawn from a fixed seed) under the current
 * environment and keeps every result. The gradient buffers start from fixed
 * non-zero values, so that "adds into" is checked along the way. */
static int run_conv(const path_case *pc, run_out *r) {
  oh_case c;
  oh_init(&c, "Conv", 17);
  int64_t xd[4] = {pc->n, pc->cin}, wd[4] = {pc->cout, pc->cin / pc->group};
  for (int i = 0; i < pc->nsp; i++) xd[2 + i] = pc->in[i], wd[2 + i] = pc->k[i];
  int64_t nx = 1, nw = 1;
  for (int i = 0; i < 2 + pc->nsp; i++) nx *= xd[i], nw *= wd[i];
  float *x = malloc(sizeof(float) * (size_t)nx), *w = malloc(sizeof(float) * (size_t)nw), b[256];
  oh_fill(x, nx, 101);
  oh_fill(w, nw, 202);
  oh_fill(b, pc->cout, 303);
  oh_input(&c, RC_DTYPE_FLOAT, 2 + pc->nsp, xd, x);
  oh_input(&c, RC_DTYPE_FLOAT, 2 + pc->nsp, wd, w);
  if (pc->bias) oh_input(&c, RC_DTYPE_FLOAT, 1, (int64_t[]){pc->cout}, b);
  if (pc->group > 1) oh_attr_int(&c, "group", pc->group);
  if (pc->s[0]) oh_attr_ints(&c, "strides", pc->nsp, pc->s);
  if (pc->d[0]) oh_attr_ints(&c, "dilations", pc->nsp, pc->d);
  oh_attr_ints(&c, "pads", 2 * pc->nsp, pc->pads);
  const int ok = run_and_keep(&c, 2 + pc->bias, r);
  free(x);
  free(w);
  oh_free(&c);
  return ok;
}

static const char *const what[4] = {"y", "dX", "dW", "dB"};

/* Prints both sides of the worst element; returns the number out of tolerance. */
static int64_t compare(const char *cs, const char *label, int i, const float *fast, const float *ref, int64_t n,
                       double tol) {
  int64_t bad = 0, worst_at = -1;
  double worst = -1;
  for (int64_t j = 0; j < n; j++) {
    const double diff = fabs((double)fast[j] - ref[j]), lim = tol * (1 + fabs(ref[j]));
    if (!(diff <= lim)) bad++;
    if (!(diff <= worst)) worst = diff, worst_at = j;
  }
  if (worst_at >= 0)
    printf("%-22s %-9s %-2s worst at %6lld: fast %.9g, plain %.9g (|diff| %.3g, tolerance %.1e), %lld off\n", cs,
           label, what[i], (long long)worst_at, fast[worst_at], ref[worst_at], worst, tol, (long long)bad);
  return bad;
}

static const char *const isa_env[3] = {"baseline", "avx2", "avx512"};

static void one_case(const path_case *pc) {
  run_out plain, fast[3];
  setenv("RECOUP_CONV_PATH", "reference", 1);
  CHECK(run_conv(pc, &plain));
  setenv("RECOUP_CONV_PATH", "builtin", 1);
  const rc__isa top = rc__isa_level();
  for (int lv = 0; lv <= (int)top; lv++) {
    setenv("RECOUP_KERNEL_ISA", isa_env[lv], 1);
    CHECK_EQ((int)rc__isa_level(), lv);
    CHECK(run_conv(pc, &fast[lv]));
    for (int i = 0; i < 3 + pc->bias; i++) {
      CHECK_EQ(fast[lv].n[i], plain.n[i]);
      if (fast[lv].n[i] != plain.n[i]) continue;
      double tol = i == 0 ? 1e-5 : 1e-4;
      /* same additions in the same order (one output channel per group: the
       * plain path's tap walk; with more, it takes the GEMMs) */
      if (pc->depthwise && pc->cout == pc->group && i < 2) tol = 0;
      CHECK_EQ(compare(pc->name, isa_env[lv], i, fast[lv].v[i], plain.v[i], plain.n[i], tol), 0);
      /* Every level gives the lowest level's bits. */
      if (lv > 0) CHECK_MEM_EQ(fast[lv].v[i], fast[0].v[i], sizeof(float) * (size_t)plain.n[i]);
    }
  }
  unsetenv("RECOUP_KERNEL_ISA");
  CHECK(!fast[0].dnnl_kept);
  CHECK(!fast[0].mm_kept);
  setenv("RECOUP_CONV_PATH", "dnnl", 1);
  if (rc__conv_path_choice() == RC_CONV_PATH_DNNL) {
    /* oneDNN sums in its own order: the batched path's tolerances. Its
     * convolutions leave depthwise and 1x1 layers to the other paths; a 1x1
     * layer of one group at stride 1 takes the batched matmul, at any map
     * size when "dnnl" is named. */
    run_out dn;
    CHECK(run_conv(pc, &dn));
    const int one_by_one = pc->k[0] == 1 && (pc->nsp == 1 || pc->k[1] == 1);
    const int matmul = one_by_one && pc->group == 1 && !pc->s[0] && !pc->pads[0];
    CHECK_INT(dn.dnnl_kept, !pc->depthwise && !one_by_one);
    CHECK_INT(dn.mm_kept, matmul);
    for (int i = 0; i < 3 + pc->bias; i++) {
      CHECK_EQ(dn.n[i], plain.n[i]);
      if (dn.n[i] == plain.n[i])
        CHECK_EQ(compare(pc->name, matmul ? "matmul" : "oneDNN", i, dn.v[i], plain.v[i], plain.n[i],
                         i == 0 ? 1e-5 : 1e-4),
                 0);
    }
    run_out_free(&dn);
    /* By default both passes take the matmul on maps of 16 to 1023 cells,
     * none at 32x32 and more (its measured rule, conv_dnnl_1x1.c; smaller
     * maps depend on the channel counts). */
    unsetenv("RECOUP_CONV_PATH");
    CHECK(run_conv(pc, &dn));
    const int64_t cells = pc->in[0] * (pc->nsp == 2 ? pc->in[1] : 1);
    if (cells >= 16) CHECK_INT(dn.mm_kept, matmul && cells < 1024);
    run_out_free(&dn);
  }
  unsetenv("RECOUP_CONV_PATH");
  for (int lv = 0; lv <= (int)top; lv++) run_out_free(&fast[lv]);
  run_out_free(&plain);
}

static void paths_agree(void) {
  const path_case cases[] = {
      /* name                 n  cin cout grp nsp in       k       s       d       pads          bias dw */
      {"1x1 batch 5", 5, 7, 9, 1, 2, {5, 3}, {1, 1}, {0}, {0}, {0, 0, 0, 0}, 1, 0},
      {"1x1 batch 1", 1, 6, 4, 1, 2, {7, 5}, {1, 1}, {0}, {0}, {0, 0, 0, 0}, 1, 0},
      {"1x1 groups 3", 4, 6, 9, 3, 2, {3, 3}, {1, 1}, {0}, {0}, {0, 0, 0, 0}, 0, 0},
      {"1x1 stride 2", 3, 5, 6, 1, 2, {7, 6}, {1, 1}, {2, 2}, {0}, {0, 0, 0, 0}, 1, 0},
      {"3x3 pad 1", 3, 5, 7, 1, 2, {9, 7}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 0},
      {"3x3 chunks 4+2", 6, 3, 5, 1, 2, {8, 8}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 0},
      {"stride dilation", 3, 4, 6, 1, 2, {11, 9}, {3, 2}, {2, 1}, {1, 2}, {1, 0, 2, 1}, 1, 0},
      {"groups 2", 3, 4, 6, 2, 2, {6, 7}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 0},
      {"conv 1-D", 4, 3, 5, 1, 1, {13}, {3}, {2}, {0}, {1, 2}, 1, 0},
      {"3x3 batch 1", 1, 3, 4, 1, 2, {6, 5}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 0},
      {"depthwise 3x3 s1", 3, 5, 5, 5, 2, {9, 7}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 1},
      {"depthwise 3x3 s2", 3, 6, 6, 6, 2, {9, 8}, {3, 3}, {2, 2}, {0}, {1, 1, 1, 1}, 1, 1},
      {"depthwise dil asym", 2, 4, 4, 4, 2, {10, 9}, {3, 3}, {1, 2}, {2, 1}, {2, 0, 1, 3}, 0, 1},
      {"depthwise 5x5 batch1", 1, 3, 3, 3, 2, {11, 13}, {5, 5}, {0}, {0}, {2, 2, 2, 2}, 1, 1},
      {"depthwise 1-D", 3, 4, 4, 4, 1, {17}, {3}, {0}, {0}, {1, 1}, 1, 1},
      {"depthwise 2x2 tiny", 2, 3, 3, 3, 2, {2, 2}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 1},
      {"depthwise 32x32", 2, 3, 3, 3, 2, {32, 32}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 1},
      {"depthwise big end pad", 2, 2, 2, 2, 2, {5, 6}, {3, 3}, {3, 1}, {0}, {0, 1, 4, 2}, 1, 1},
      /* rows of 16 outputs or more: computed row by row (stride 1 input gradient too) */
      {"depthwise rows s2", 2, 3, 3, 3, 2, {35, 33}, {3, 3}, {2, 2}, {0}, {1, 1, 1, 1}, 1, 1},
      {"depthwise rows dil2 pad0", 2, 4, 4, 4, 2, {9, 21}, {3, 3}, {0}, {2, 2}, {0, 0, 0, 0}, 1, 1},
      {"depthwise rows pad2 b1", 1, 3, 3, 3, 2, {7, 20}, {3, 3}, {0}, {0}, {2, 2, 2, 2}, 0, 1},
      {"depthwise 1-D rows s2", 2, 3, 3, 3, 1, {40}, {3}, {2}, {0}, {1, 1}, 1, 1},
      {"depthwise 7x7 pad0", 3, 4, 4, 4, 2, {7, 7}, {3, 3}, {0}, {0}, {0, 0, 0, 0}, 1, 1},
      {"depthwise 5x9 s2 pad2", 2, 3, 3, 3, 2, {5, 9}, {3, 3}, {2, 2}, {0}, {2, 2, 2, 2}, 1, 1},
      {"depthwise 7x7 s2 dil2", 2, 3, 3, 3, 2, {7, 7}, {3, 3}, {2, 2}, {2, 2}, {1, 1, 1, 1}, 1, 1},
      {"depth multiplier 2", 2, 3, 6, 3, 2, {6, 6}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 1},
      {"depth mult 3 s2 rows", 2, 2, 6, 2, 2, {9, 34}, {3, 3}, {2, 2}, {0}, {1, 1, 1, 1}, 1, 1},
      {"depth mult 2 dil2 b1", 1, 4, 8, 4, 2, {7, 5}, {3, 3}, {0}, {2, 2}, {2, 2, 2, 2}, 0, 1},
      /* channels in oneDNN's blocks of 16: its direct kernels, with reorders */
      {"blocked 16-32 s2", 3, 16, 32, 1, 2, {9, 9}, {3, 3}, {2, 2}, {0}, {1, 1, 1, 1}, 1, 0},
      {"blocked groups 2 dil", 2, 32, 32, 2, 2, {7, 6}, {3, 3}, {0}, {2, 2}, {2, 2, 2, 2}, 0, 0},
      {"blocked 3x3 batch 1", 1, 32, 16, 1, 2, {5, 5}, {3, 3}, {0}, {0}, {1, 1, 1, 1}, 1, 0},
      /* 1x1 layers for the batched matmul: odd channel counts, maps 1x1 to 32x32, batch 1 */
      {"1x1 3-5 map 1x1", 4, 3, 5, 1, 2, {1, 1}, {1, 1}, {0}, {0}, {0, 0, 0, 0}, 1, 0},
      {"1x1 17-33 map 2x2", 3, 17, 33, 1, 2, {2, 2}, {1, 1}, {0}, {0}, {0, 0, 0, 0}, 0, 0},
      {"1x1 17-33 7x7 b1", 1, 17, 33, 1, 2, {7, 7}, {1, 1}, {0}, {0}, {0, 0, 0, 0}, 1, 0},
      {"1x1 3-5 32x32", 2, 3, 5, 1, 2, {32, 32}, {1, 1}, {0}, {0}, {0, 0, 0, 0}, 0, 0},
      {"1x1 33-17 16x16 b1", 1, 33, 17, 1, 2, {16, 16}, {1, 1}, {0}, {0}, {0, 0, 0, 0}, 1, 0},
      {"1x1 1-D", 3, 5, 3, 1, 1, {9}, {1}, {0}, {0}, {0, 0}, 0, 0},
  };
  for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
    const int before = test_failed_checks_;
    one_case(&cases[i]);
    if (test_failed_checks_ != before) fprintf(stderr, "FAIL case %s\n", cases[i].name);
  }
}

int main(void) {
  unsetenv("RECOUP_KERNEL_ISA");
  unsetenv("RECOUP_CONV_PATH");
  printf("instruction-set levels on this CPU: up to %s\n", isa_env[rc__isa_level()]);
  setenv("RECOUP_CONV_PATH", "dnnl", 1);
  printf("oneDNN path: %s\n", rc__conv_path_choice() == RC_CONV_PATH_DNNL ? "built in, checked" : "not built in");
  unsetenv("RECOUP_CONV_PATH");
  RUN(paths_agree);
  return TEST_REPORT();
}
