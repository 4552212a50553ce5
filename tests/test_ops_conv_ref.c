/* Conv, ConvTranspose, pools, Gemm and MatMul against PyTorch (Debian
 * python3-torch): scripts/ref_ops_conv.py writes inputs, outputs and
 * autograd gradients for fixed-seed cases into the build folder (a ctest
 * fixture); here the same inputs go through recoup's kernels. Each case below
 * gives the ONNX attributes equivalent to the torch call in the script.
 * Forward: |ours - torch| <= 1e-4 * (1 + |torch|); gradients:
 * |ours - torch| <= 1e-3 * (1 + |torch|). */
#include "ops_check.h"

#define MAX_ENTRIES 512

typedef struct ref_entry {
  char key[96];
  int rank;
  int64_t dims[RC_MAX_RANK];
} ref_entry;

static ref_entry entries[MAX_ENTRIES];
static int n_entries;
static char ref_dir[1024];

static int load_index(void) {
  FILE *f = test_ref_open(ref_dir, sizeof ref_dir, "ref_ops_conv", "index.txt", "scripts/ref_ops_conv.py",
                          "ops_conv_ref_data");
  if (!f) return 0;
  char line[512];
  while (fgets(line, sizeof line, f) && n_entries < MAX_ENTRIES) {
    ref_entry *r = &entries[n_entries];
    int off = 0;
    if (sscanf(line, "%95s %d%n", r->key, &r->rank, &off) != 2 || r->rank < 0 || r->rank > RC_MAX_RANK) continue;
    const char *p = line + off;
    int ok = 1;
    for (int i = 0; i < r->rank; i++) {
      long long d;
      int used = 0;
      if (sscanf(p, "%lld%n", &d, &used) != 1) ok = 0;
      r->dims[i] = d;
      p += used;
    }
    if (ok) n_entries++;
  }
  fclose(f);
  return n_entries > 0;
}

/* Tensor <case>.<name>: shape into t, data malloc'd (caller frees); NULL if absent. */
static float *load(const char *cs, const char *name, rc_tensor *t) {
  char key[128];
  snprintf(key, sizeof key, "%s.%s", cs, name);
  for (int i = 0; i < n_entries; i++) {
    if (strcmp(entries[i].key, key)) continue;
    memset(t, 0, sizeof *t);
    t->dtype = RC_DTYPE_FLOAT;
    t->rank = entries[i].rank;
    memcpy(t->dims, entries[i].dims, sizeof t->dims);
    int64_t n = rc_tensor_numel(t);
    char path[1400];
    snprintf(path, sizeof path, "%s/%s.bin", ref_dir, key);
    FILE *f = fopen(path, "rb");
    float *d = malloc(sizeof(float) * (size_t)(n ? n : 1));
    if (!f || fread(d, sizeof(float), (size_t)n, f) != (size_t)n) {
      fprintf(stderr, "cannot read PyTorch reference tensor %s\n", path);
      if (f) fclose(f);
      free(d);
      return NULL;
    }
    fclose(f);
    return d;
  }
  fprintf(stderr, "PyTorch reference tensor %s not in the index\n", key);
  return NULL;
}

typedef struct ref_case {
  const char *name, *op;
  int opset;
  const char *inputs[3];
  void (*attrs)(oh_case *c);
  int indices; /* MaxPool: also compare the Indices output */
} ref_case;

static void ints(oh_case *c, const char *name, int n, int64_t a, int64_t b, int64_t cc, int64_t d) {
  const int64_t v[4] = {a, b, cc, d};
  oh_attr_ints(c, name, n, v);
}

/* F.conv2d(stride=(2,1), padding=(1,2), dilation=(1,2)) */
static void a_conv2d_basic(oh_case *c) {
  ints(c, "strides", 2, 2, 1, 0, 0);
  ints(c, "pads", 4, 1, 2, 1, 2);
  ints(c, "dilations", 2, 1, 2, 0, 0);
}
/* F.conv2d(padding=1, groups=2) */
static void a_conv2d_group(oh_case *c) {
  ints(c, "pads", 4, 1, 1, 1, 1);
  oh_attr_int(c, "group", 2);
}
/* F.conv2d(stride=2, padding=1, dilation=2, groups=3) */
static void a_conv2d_depthwise(oh_case *c) {
  ints(c, "strides", 2, 2, 2, 0, 0);
  ints(c, "pads", 4, 1, 1, 1, 1);
  ints(c, "dilations", 2, 2, 2, 0, 0);
  oh_attr_int(c, "group", 3);
}
/* F.conv2d(stride=2, padding=1) */
static void a_s2_pad1(oh_case *c) {
  ints(c, "strides", 2, 2, 2, 0, 0);
  ints(c, "pads", 4, 1, 1, 1, 1);
}
/* F.conv2d(padding=2, dilation=2, groups=2) */
static void a_group_dil(oh_case *c) {
  ints(c, "pads", 4, 2, 2, 2, 2);
  ints(c, "dilations", 2, 2, 2, 0, 0);
  oh_attr_int(c, "group", 2);
}
static void a_none(oh_case *c) { (void)c; }
/* F.conv2d(padding=1) */
static void a_pad1(oh_case *c) { ints(c, "pads", 4, 1, 1, 1, 1); }
/* F.conv2d(padding=1, groups=5) */
static void a_dw_s1(oh_case *c) {
  a_pad1(c);
  oh_attr_int(c, "group", 5);
}
/* F.conv2d(stride=2, padding=(1, 2), groups=6) */
static void a_dw_s2(oh_case *c) {
  ints(c, "strides", 2, 2, 2, 0, 0);
  ints(c, "pads", 4, 1, 2, 1, 2);
  oh_attr_int(c, "group", 6);
}
/* F.conv2d(stride=2, padding=1, groups=3), also with 6 output channels */
static void a_dw_rows_s2(oh_case *c) {
  a_s2_pad1(c);
  oh_attr_int(c, "group", 3);
}
/* F.conv2d(dilation=2, groups=4) */
static void a_dw_rows_dil2(oh_case *c) {
  ints(c, "dilations", 2, 2, 2, 0, 0);
  oh_attr_int(c, "group", 4);
}
/* F.conv1d(padding=2, dilation=2, groups=4) */
static void a_dw_1d(oh_case *c) {
  ints(c, "pads", 2, 2, 2, 0, 0);
  ints(c, "dilations", 1, 2, 0, 0, 0);
  oh_attr_int(c, "group", 4);
}

/* F.conv1d(stride=2, padding=1) */
static void a_conv1d(oh_case *c) {
  ints(c, "strides", 1, 2, 0, 0, 0);
  ints(c, "pads", 2, 1, 1, 0, 0);
}
/* F.conv_transpose2d(stride=2, padding=1, output_padding=1, groups=2) */
static void a_convt2d_group(oh_case *c) {
  a_s2_pad1(c);
  ints(c, "output_padding", 2, 1, 1, 0, 0);
  oh_attr_int(c, "group", 2);
}
/* F.conv_transpose2d(stride=(1,2), padding=(0,1), output_padding=(1,1), dilation=(2,1)) */
static void a_convt2d_dilated(oh_case *c) {
  ints(c, "strides", 2, 1, 2, 0, 0);
  ints(c, "pads", 4, 0, 1, 0, 1);
  ints(c, "output_padding", 2, 1, 1, 0, 0);
  ints(c, "dilations", 2, 2, 1, 0, 0);
}
/* F.max_pool2d(3, stride=2, padding=1, ceil_mode=True) */
static void a_maxpool_ceil(oh_case *c) {
  ints(c, "kernel_shape", 2, 3, 3, 0, 0);
  ints(c, "strides", 2, 2, 2, 0, 0);
  ints(c, "pads", 4, 1, 1, 1, 1);
  oh_attr_int(c, "ceil_mode", 1);
}
/* F.max_pool2d((2,3), stride=2, padding=1, dilation=(2,1), ceil_mode=True) */
static void a_maxpool_dilated(oh_case *c) {
  ints(c, "kernel_shape", 2, 2, 3, 0, 0);
  ints(c, "strides", 2, 2, 2, 0, 0);
  ints(c, "pads", 4, 1, 1, 1, 1);
  ints(c, "dilations", 2, 2, 1, 0, 0);
  oh_attr_int(c, "ceil_mode", 1);
}
/* F.avg_pool2d(3, stride=2, padding=1, ceil_mode=True, count_include_pad=True/False) */
static void a_avgpool_incl(oh_case *c) {
  a_maxpool_ceil(c);
  oh_attr_int(c, "count_include_pad", 1);
}
static void a_avgpool_excl(oh_case *c) {
  a_maxpool_ceil(c);
  oh_attr_int(c, "count_include_pad", 0);
}
/* F.avg_pool2d((2,3), stride=(2,3)) */
static void a_avgpool_plain(oh_case *c) {
  ints(c, "kernel_shape", 2, 2, 3, 0, 0);
  ints(c, "strides", 2, 2, 3, 0, 0);
}
/* F.linear(x, w, b) = Gemm(x, w, b, transB=1) */
static void a_linear(oh_case *c) { oh_attr_int(c, "transB", 1); }
/* torch.addmm(c, a.t(), b, beta=0.5, alpha=-2) = Gemm(a, b, c, transA=1, alpha=-2, beta=0.5) */
static void a_gemm_ta_beta(oh_case *c) {
  oh_attr_int(c, "transA", 1);
  oh_attr_float(c, "alpha", -2.0f);
  oh_attr_float(c, "beta", 0.5f);
}

static const ref_case cases[] = {
    {"conv2d_basic", "Conv", 13, {"x", "w", "b"}, a_conv2d_basic, 0},
    {"conv2d_group", "Conv", 13, {"x", "w", "b"}, a_conv2d_group, 0},
    {"conv2d_depthwise", "Conv", 13, {"x", "w", "b"}, a_conv2d_depthwise, 0},
    {"conv2d_1x1", "Conv", 13, {"x", "w", "b"}, a_none, 0},
    {"conv1d", "Conv", 13, {"x", "w", "b"}, a_conv1d, 0},
    {"conv2d_chunk", "Conv", 13, {"x", "w", "b"}, a_pad1, 0},
    {"conv2d_1x1_batch", "Conv", 13, {"x", "w", "b"}, a_none, 0},
    {"conv2d_dw_s1", "Conv", 13, {"x", "w", "b"}, a_dw_s1, 0},
    {"conv2d_dw_s2_b1", "Conv", 13, {"x", "w", "b"}, a_dw_s2, 0},
    {"conv1d_dw", "Conv", 13, {"x", "w", "b"}, a_dw_1d, 0},
    {"conv2d_dw_mult2", "Conv", 13, {"x", "w", "b"}, a_dw_rows_s2, 0},
    {"conv2d_dw_rows_s2", "Conv", 13, {"x", "w", "b"}, a_dw_rows_s2, 0},
    {"conv2d_dw_rows_dil2", "Conv", 13, {"x", "w", "b"}, a_dw_rows_dil2, 0},
    {"conv2d_blocked_s2", "Conv", 13, {"x", "w", "b"}, a_s2_pad1, 0},
    {"conv2d_blocked_group_dil", "Conv", 13, {"x", "w", "b"}, a_group_dil, 0},
    {"conv2d_blocked_b1", "Conv", 13, {"x", "w", "b"}, a_pad1, 0},
    {"conv2d_1x1_map1", "Conv", 13, {"x", "w", "b"}, a_none, 0},
    {"conv2d_1x1_map2_nobias", "Conv", 13, {"x", "w"}, a_none, 0},
    {"conv2d_1x1_map7_b1", "Conv", 13, {"x", "w", "b"}, a_none, 0},
    {"conv2d_1x1_map32_nobias", "Conv", 13, {"x", "w"}, a_none, 0},
    {"convt2d_group", "ConvTranspose", 13, {"x", "w", "b"}, a_convt2d_group, 0},
    {"convt2d_dilated", "ConvTranspose", 13, {"x", "w", "b"}, a_convt2d_dilated, 0},
    {"maxpool_ceil", "MaxPool", 12, {"x"}, a_maxpool_ceil, 1},
    {"maxpool_dilated", "MaxPool", 12, {"x"}, a_maxpool_dilated, 0},
    {"avgpool_incl", "AveragePool", 19, {"x"}, a_avgpool_incl, 0},
    {"avgpool_excl", "AveragePool", 19, {"x"}, a_avgpool_excl, 0},
    {"avgpool_plain", "AveragePool", 11, {"x"}, a_avgpool_plain, 0},
    {"global_avg", "GlobalAveragePool", 13, {"x"}, a_none, 0},
    {"global_max", "GlobalMaxPool", 13, {"x"}, a_none, 0},
    {"linear", "Gemm", 13, {"x", "w", "b"}, a_linear, 0},
    {"gemm_ta_beta", "Gemm", 13, {"a", "b", "c"}, a_gemm_ta_beta, 0},
    {"matmul_bcast", "MatMul", 13, {"a", "b"}, a_none, 0},
    {"matmul_2d_right", "MatMul", 13, {"a", "b"}, a_none, 0},
    {"matmul_1d_left", "MatMul", 13, {"a", "b"}, a_none, 0},
    {"matmul_1d_right", "MatMul", 13, {"a", "b"}, a_none, 0},
};

static int compare(const char *cs, const char *what, const float *ours, const float *ref, int64_t n,
                   double tol) {
  int bad = 0;
  double worst = 0;
  for (int64_t i = 0; i < n; i++) {
    double lim = tol * (1 + fabs(ref[i])), diff = fabs((double)ours[i] - ref[i]);
    if (!(diff <= lim)) {
      if (bad < 3)
        fprintf(stderr, "%s %s[%lld]: recoup %.7g, PyTorch %.7g\n", cs, what, (long long)i, ours[i], ref[i]);
      bad++;
    }
    if (diff > worst) worst = diff;
  }
  if (bad) fprintf(stderr, "%s %s: %d of %lld values off (worst |diff| %.3g)\n", cs, what, bad, (long long)n, worst);
  return bad == 0;
}

static void run_case(const ref_case *rc) {
  oh_case c;
  oh_init(&c, rc->op, rc->opset);
  if (rc->indices) c.n_out = 2;
  float *data[3] = {0}, *grads[3] = {0};
  rc_tensor shape[3], gshape[3], yt, dyt;
  int n_in = 0;
  for (; n_in < 3 && rc->inputs[n_in]; n_in++) {
    char gname[16];
    snprintf(gname, sizeof gname, "g_%s", rc->inputs[n_in]);
    data[n_in] = load(rc->name, rc->inputs[n_in], &shape[n_in]);
    grads[n_in] = load(rc->name, gname, &gshape[n_in]);
    CHECK(data[n_in] && grads[n_in]);
    if (!data[n_in] || !grads[n_in]) goto done;
    oh_input(&c, RC_DTYPE_FLOAT, shape[n_in].rank, shape[n_in].dims, data[n_in]);
  }
  float *y = load(rc->name, "y", &yt), *dy = load(rc->name, "dy", &dyt);
  CHECK(y && dy);
  rc->attrs(&c);
  rc_err e = {0};
  rc_status st = y && dy ? oh_run(&c, &e) : RC_ERR_IO;
  if (st != RC_OK) fprintf(stderr, "%s: %s\n", rc->name, e.msg);
  CHECK_INT(st, RC_OK);
  if (st == RC_OK) {
    /* source: PyTorch (Debian python3-torch), forward */
    CHECK(rc_shape_equal(&c.out_t[0], &yt));
    if (rc_shape_equal(&c.out_t[0], &yt))
      CHECK(compare(rc->name, "y", oh_out_f(&c, 0), y, rc_tensor_numel(&yt), 1e-4));
    if (rc->indices) {
      /* source: PyTorch (Debian python3-torch) max_pool2d indices, which are
       * plane-local; ONNX Indices flatten over (N, C, spatial). */
      rc_tensor it;
      float *idx = load(rc->name, "idx", &it);
      CHECK_NOT_NULL(idx);
      if (idx) {
        int64_t per_plane = rc_tensor_numel(&it) / (it.dims[0] * it.dims[1]);
        int64_t in_plane = shape[0].dims[2] * shape[0].dims[3];
        const int64_t *ours = c.out_t[1].data;
        for (int64_t i = 0; i < rc_tensor_numel(&it); i++)
          CHECK_INT(ours[i], (int64_t)idx[i] + (i / per_plane) * in_plane);
        free(idx);
      }
    }
    /* source: PyTorch (Debian python3-torch) autograd, gradients of sum(y * dy) */
    int wanted[4];
    for (int i = 0; i < n_in; i++) wanted[i] = i;
    wanted[n_in] = -1;
    run_backward(&c, dy, wanted);
    for (int i = 0; i < n_in; i++) {
      char what[16];
      snprintf(what, sizeof what, "g_%s", rc->inputs[i]);
      CHECK(compare(rc->name, what, grad_of(&c, i), grads[i], rc_tensor_numel(&gshape[i]), 1e-3));
    }
  }
  free(y);
  free(dy);
done:
  for (int i = 0; i < 3; i++) free(data[i]), free(grads[i]);
  oh_free(&c);
}

static void reference_data_present(void) { CHECK(load_index()); }

static void all_cases(void) {
  if (!n_entries) {
    CHECK(!"PyTorch reference data missing");
    return;
  }
  for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
    int before = test_failed_checks_;
    run_case(&cases[i]);
    if (test_failed_checks_ != before) fprintf(stderr, "FAIL case %s\n", cases[i].name);
  }
}

int main(void) {
  RUN(reference_data_present);
  RUN(all_cases);
  return TEST_REPORT();
}
