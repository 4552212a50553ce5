/* The sparse kernels of Conv, Gemm and MatMul (src/ops/sparse_conv.c,
 * sparse_gemm.c) and the N:M Conv kernels (nm_conv.c) against PyTorch
 * (Debian python3-torch):
 * scripts/ref_ops_sparse.py prunes each case's weight with a mask, computes
 * torch's output and autograd gradients in float64 and writes them into the
 * build folder (the ctest fixture ops_sparse_ref); here the same inputs run
 * with the mask as the weight's pattern and RECOUP_CONV_PATH=sparse, so the
 * sparse kernels serve whatever the density. Each case spells out the ONNX
 * attributes equal to the torch call in the script.
 *
 * Output and gradients: within 1e-4 * |torch| + 1e-6 * (largest |torch|)
 * (ref_check_grad), the weight gradient at kept positions. At frozen
 * positions the weight gradient buffer must stay exactly zero, although
 * torch's gradient there is not zero: the kernels give frozen weights no
 * work and no write. */
#define _POSIX_C_SOURCE 200112L
#include <stdlib.h>

#include "ops/nm.h"
#include "ops/sparse.h"
#include "ops_check.h"
#include "ref_arrays.h"

typedef struct ref_case {
  const char *name, *op;
  int x_rank, w_rank, with_c; /* with_c: input 2 (bias or C) is passed */
  int64_t x[4], w[4], c;
  void (*attrs)(oh_case *c);
} ref_case;

/* F.conv2d(padding=1) */
static void a_c3(oh_case *c) { oh_attr_ints(c, "pads", 4, (int64_t[]){1, 1, 1, 1}); }
/* F.conv2d(stride=(2,1), padding=(1,0), dilation=(1,2), groups=2) */
static void a_cg(oh_case *c) {
  oh_attr_ints(c, "strides", 2, (int64_t[]){2, 1});
  oh_attr_ints(c, "pads", 4, (int64_t[]){1, 0, 1, 0});
  oh_attr_ints(c, "dilations", 2, (int64_t[]){1, 2});
  oh_attr_int(c, "group", 2);
}
static void a_none(oh_case *c) { (void)c; }
/* F.conv1d(stride=2, padding=1) */
static void a_cd(oh_case *c) {
  oh_attr_ints(c, "strides", 1, (int64_t[]){2});
  oh_attr_ints(c, "pads", 2, (int64_t[]){1, 1});
}
/* F.linear: Gemm(transB=1) */
static void a_lin(oh_case *c) { oh_attr_int(c, "transB", 1); }
/* torch.addmm(c, a, w, beta=0.5, alpha=-2) */
static void a_gnt(oh_case *c) {
  oh_attr_float(c, "alpha", -2.0f);
  oh_attr_float(c, "beta", 0.5f);
}

static int64_t numel(const int64_t *d, int r) {
  int64_t n = 1;
  for (int i = 0; i < r; i++) n *= d[i];
  return n;
}

static const float *arr(const ref_case *rc, const char *what, int64_t n) {
  char key[64];
  snprintf(key, sizeof key, "%s_%s", rc->name, what);
  return ref(key, (long)n);
}

/* Entries of a at kept positions (mask 1), packed into out; returns the count. */
static long kept_only(float *out, const float *a, const float *mask, int64_t n) {
  long k = 0;
  for (int64_t i = 0; i < n; i++)
    if (mask[i] != 0.0f) out[k++] = a[i];
  return k;
}

/* with_nm: the N:M format is attached too (and must be made). */
static void one_case(const ref_case *rc, int with_nm) {
  const int64_t nx = numel(rc->x, rc->x_rank), nw = numel(rc->w, rc->w_rank);
  const float *x = arr(rc, "x", nx), *w = arr(rc, "w", nw), *b = arr(rc, "b", rc->c), *mask = arr(rc, "mask", nw);
  if (!x || !w || !b || !mask) return;
  oh_case c;
  oh_init(&c, rc->op, 17);
  oh_input(&c, RC_DTYPE_FLOAT, rc->x_rank, rc->x, x);
  oh_input(&c, RC_DTYPE_FLOAT, rc->w_rank, rc->w, w);
  if (rc->with_c) oh_input(&c, RC_DTYPE_FLOAT, 1, (int64_t[]){rc->c}, b);
  rc->attrs(&c);
  uint8_t *keep = malloc((size_t)nw);
  for (int64_t i = 0; i < nw; i++) keep[i] = mask[i] != 0.0f;
  rc__wpattern pat;
  rc_err e = {0};
  CHECK_STATUS(rc__wpattern_build(&pat, &c.arena, keep, rc->w[0], nw / rc->w[0], &e), RC_OK);
  if (with_nm) {
    CHECK_STATUS(rc__nm_attach(&pat, &c.arena, keep, nw / (rc->w[0] * rc->w[1]), &e), RC_OK);
    CHECK(pat.nm != NULL);
  }
  c.pattern = &pat;
  if (run_ok(&c)) {
    const int64_t ny = rc_tensor_numel(&c.out_t[0]);
    char what[64];
    snprintf(what, sizeof what, "%s y", rc->name);
    ref_check_grad(what, oh_out_f(&c, 0), arr(rc, "y", ny), (long)ny);
    const int with_c[] = {0, 1, 2, -1}, no_c[] = {0, 1, -1};
    run_backward(&c, arr(rc, "dy", ny), rc->with_c ? with_c : no_c);
    snprintf(what, sizeof what, "%s dX", rc->name);
    ref_check_grad(what, grad_of(&c, 0), arr(rc, "g_x", nx), (long)nx);
    if (rc->with_c) {
      snprintf(what, sizeof what, "%s dB", rc->name);
      ref_check_grad(what, grad_of(&c, 2), arr(rc, "g_b", rc->c), (long)rc->c);
    }
    const float *gw = arr(rc, "g_w", nw);
    float *ours = malloc(sizeof(float) * (size_t)nw), *theirs = malloc(sizeof(float) * (size_t)nw);
    if (gw) {
      long k = kept_only(ours, grad_of(&c, 1), mask, nw);
      kept_only(theirs, gw, mask, nw);
      snprintf(what, sizeof what, "%s dW (kept)", rc->name);
      ref_check_grad(what, ours, theirs, k);
      int64_t frozen = 0, written = 0, torch_nonzero = 0;
      for (int64_t i = 0; i < nw; i++)
        if (!keep[i]) {
          frozen++;
          written += grad_of(&c, 1)[i] != 0.0f || signbit(grad_of(&c, 1)[i]);
          torch_nonzero += gw[i] != 0.0f;
        }
      printf("%-4s %lld kept, %lld frozen (PyTorch's gradient non-zero at %lld of them), %lld written\n",
             rc->name, (long long)k, (long long)frozen, (long long)torch_nonzero, (long long)written);
      CHECK_EQ(written, 0);
    }
    free(ours);
    free(theirs);
  }
  free(keep);
  oh_free(&c);
}

static void sparse_matches_torch(void) {
  const ref_case cases[] = {
      {"c3", "Conv", 4, 4, 1, {3, 8, 9, 7}, {12, 8, 3, 3}, 12, a_c3},
      {"cg", "Conv", 4, 4, 1, {2, 6, 10, 9}, {8, 3, 3, 2}, 8, a_cg},
      {"c1", "Conv", 4, 4, 1, {1, 16, 5, 5}, {10, 16, 1, 1}, 10, a_none},
      {"cd", "Conv", 3, 3, 1, {4, 3, 13}, {5, 3, 3}, 5, a_cd},
      {"lin", "Gemm", 2, 2, 1, {5, 24}, {10, 24}, 10, a_lin},
      {"gnt", "Gemm", 2, 2, 1, {6, 12}, {12, 5}, 5, a_gnt},
      {"mm", "MatMul", 3, 2, 0, {2, 3, 16}, {16, 7}, 1, a_none},
  };
  for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
    const int before = test_failed_checks_;
    one_case(&cases[i], 0);
    if (test_failed_checks_ != before) fprintf(stderr, "FAIL case %s\n", cases[i].name);
  }
}

/* N:M masks along input channels (2:4, and 4:8 for the 1-D case) through
 * the N:M kernels (RECOUP_CONV_PATH=nm-on): 3x3 with padding and a map
 * of 99 cells (a 64-column strip and a tail), strides and dilation at
 * batch 1, a 1x1 convolution read in place, and 1-D. */
/* F.conv2d(stride=(2,1), padding=(1,0), dilation=(1,2)) */
static void a_ns(oh_case *c) {
  oh_attr_ints(c, "strides", 2, (int64_t[]){2, 1});
  oh_attr_ints(c, "pads", 4, (int64_t[]){1, 0, 1, 0});
  oh_attr_ints(c, "dilations", 2, (int64_t[]){1, 2});
}
/* F.conv1d(padding=1) */
static void a_nd(oh_case *c) { oh_attr_ints(c, "pads", 2, (int64_t[]){1, 1}); }

static void nm_matches_torch(void) {
  const ref_case cases[] = {
      {"n3", "Conv", 4, 4, 1, {2, 8, 9, 11}, {12, 8, 3, 3}, 12, a_c3},
      {"ns", "Conv", 4, 4, 1, {1, 8, 11, 12}, {6, 8, 3, 2}, 6, a_ns},
      {"n1", "Conv", 4, 4, 1, {3, 16, 9, 8}, {10, 16, 1, 1}, 10, a_none},
      {"nd", "Conv", 3, 3, 1, {2, 8, 70}, {5, 8, 3}, 5, a_nd},
  };
  setenv("RECOUP_CONV_PATH", "nm-on", 1);
  for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
    const int before = test_failed_checks_;
    one_case(&cases[i], 1);
    if (test_failed_checks_ != before) fprintf(stderr, "FAIL case %s\n", cases[i].name);
  }
  setenv("RECOUP_CONV_PATH", "sparse", 1);
}

int main(void) {
  if (!ref_load("ops_sparse_ref", "ops_sparse_ref_data")) return 1;
  setenv("RECOUP_CONV_PATH", "sparse", 1);
  RUN(sparse_matches_torch);
  RUN(nm_matches_torch);
  ref_free();
  return TEST_REPORT();
}
