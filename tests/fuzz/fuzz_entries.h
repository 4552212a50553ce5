/* One function per fuzz target: feed bytes to a reader the way recoup's
 * commands do, then free everything. Shared by the libFuzzer targets
 * (tests/fuzz/fuzz_*.c) and by tests/test_fuzz_regressions.c, which replays
 * every saved crashing input through the same code in ordinary builds.
 * Each returns the reader's status; only a crash, a leak or a sanitizer
 * report is a failure, an error status is the expected answer to junk. */
#ifndef RC_FUZZ_ENTRIES_H
#define RC_FUZZ_ENTRIES_H

#include <stddef.h>
#include <stdint.h>
#include <string.h>

#include "core/alloc.h"
#include "data/tensorproto.h"
#include "onnx/model.h"
#include "plan/load.h"
#include "plan/plan.h"
#include "recoup/data.h"
#include "recoup/image.h"

/* Inputs larger than this are not planned: a fuzz run should spend its time
 * on the parsers and shape checks, not on big forward passes. */
#define RC_FUZZ_MAX_INPUT_ELEMS ((int64_t)1 << 16)
#define RC_FUZZ_MAX_PLAN_BYTES ((size_t)64 << 20)
#define RC_FUZZ_MAX_DATA_BYTES ((size_t)256 << 20)

/* Every graph input at its declared shape with symbolic dims taken as 1 (as
 * `recoup inspect` plans), filled with small values, then one forward pass. */
static inline rc_status rc_fuzz_plan_model(const rc_graph *g, rc_err *e) {
  rc_tensor *ins = rc__calloc((size_t)g->n_inputs + 1, sizeof(rc_tensor));
  if (!ins) return RC_ERR_NOMEM;
  rc_status st = RC_OK;
  for (int i = 0; i < g->n_inputs && st == RC_OK; i++) {
    ins[i] = g->values[g->inputs[i]].decl;
    ins[i].data = NULL;
    if (ins[i].rank < 0) ins[i].rank = 0;
    int64_t numel = 1;
    for (int d = 0; d < ins[i].rank; d++) {
      if (ins[i].dims[d] < 0) ins[i].dims[d] = 1;
      numel *= ins[i].dims[d] > 0 ? ins[i].dims[d] : 1;
      if (numel > RC_FUZZ_MAX_INPUT_ELEMS) st = RC_ERR_LIMIT;
    }
  }
  rc_plan *p = NULL;
  rc_plan_opts o = {0};
  o.max_bytes = RC_FUZZ_MAX_PLAN_BYTES;
  if (st == RC_OK) st = rc_plan_init(&p, g, ins, &o, e);
  if (st == RC_OK) {
    for (int i = 0; i < g->n_inputs; i++) {
      rc_tensor *t = rc_plan_tensor(p, g->inputs[i]);
      if (!t || !t->data) continue;
      size_t nb = rc_tensor_nbytes(t);
      if (nb == SIZE_MAX) continue;
      if (t->dtype == RC_DTYPE_FLOAT) {
        float *x = t->data;
        for (size_t k = 0; k < nb / sizeof(float); k++) x[k] = (float)((int)(k % 7) - 3) * 0.25f;
      } else {
        memset(t->data, 0, nb);
      }
    }
    st = rc_plan_forward(p, e);
  }
  rc_plan_free(p);
  rc__free(ins);
  return st;
}

static inline int rc_fuzz_onnx(const uint8_t *data, size_t size) {
  rc_err e;
  rc_model *m = NULL;
  rc_status st = rc_model_load_mem(&m, data, size, "fuzz.onnx", NULL, &e);
  if (st == RC_OK) st = rc_fuzz_plan_model(&m->graph, &e);
  rc_model_free(m);
  return st;
}

/* A successful read must also convert: that walks every element once. */
static inline int rc_fuzz_array(const uint8_t *data, size_t size, rc_data_format fmt,
                                const char *name) {
  rc_err e;
  rc_array a, f;
  memset(&f, 0, sizeof f);
  rc_status st = rc_array_read_mem(&a, data, size, fmt, name, NULL, RC_FUZZ_MAX_DATA_BYTES, &e);
  if (st == RC_OK && a.t.rank >= 1 && rc_dtype_size(a.t.dtype) > 0) {
    st = rc_data_to_float_array(&f, &a, NULL, &e);
    rc_array_free(&f);
  }
  rc_array_free(&a);
  return st;
}

static inline int rc_fuzz_npy(const uint8_t *data, size_t size) {
  return rc_fuzz_array(data, size, RC_DATA_NPY, "fuzz.npy");
}

static inline int rc_fuzz_idx(const uint8_t *data, size_t size) {
  int gz = size >= 2 && data[0] == 0x1f && data[1] == 0x8b;
  return rc_fuzz_array(data, size, gz ? RC_DATA_GZIP : RC_DATA_IDX, gz ? "fuzz.idx.gz" : "fuzz.idx");
}

/* Member listing, the first member, and a member by name. */
static inline int rc_fuzz_npz(const uint8_t *data, size_t size) {
  rc_err e;
  char **names = NULL;
  int count = 0;
  rc_status st = rc_npz_list_mem(&names, &count, data, size, "fuzz.npz", &e);
  rc_status st2 = (rc_status)rc_fuzz_array(data, size, RC_DATA_NPZ, "fuzz.npz");
  if (st == RC_OK && count > 0) {
    rc_array a;
    rc_status st3 = rc_array_read_mem(&a, data, size, RC_DATA_NPZ, "fuzz.npz", names[count - 1],
                                      RC_FUZZ_MAX_DATA_BYTES, &e);
    if (st3 == RC_OK) rc_array_free(&a);
  }
  rc_data_names_free(names);
  return st != RC_OK ? st : st2;
}

static inline int rc_fuzz_tensorproto(const uint8_t *data, size_t size) {
  rc_err e;
  rc_tensor t;
  void *owned = NULL;
  rc_status st = rc__tensorproto_mem_read(data, size, "fuzz.pb", &t, &owned, RC_FUZZ_MAX_DATA_BYTES, &e);
  if (st == RC_OK && t.data && rc_dtype_size(t.dtype) > 0) {
    /* Touch every byte the reader claims to have produced. */
    size_t nb = rc_tensor_nbytes(&t);
    volatile uint8_t sum = 0;
    for (size_t k = 0; nb != SIZE_MAX && k < nb; k++) sum ^= ((const uint8_t *)t.data)[k];
    (void)sum;
  }
  rc__free(owned);
  return st;
}

/* Decode, then prepare as `recoup eval` does for a 3-channel 16x16 input
 * after --resize 20 (conversion, both resampling directions, crop). Pictures
 * over 2^22 pixels are refused early so runs stay fast. */
#define RC_FUZZ_MAX_IMAGE_PIXELS ((int64_t)1 << 22)
static inline int rc_fuzz_image(const uint8_t *data, size_t size) {
  rc_err e;
  rc_image im;
  rc_status st = rc_image_decode(&im, data, size, "fuzz.img", RC_FUZZ_MAX_IMAGE_PIXELS, &e);
  if (st != RC_OK) return st;
  uint8_t out[3 * 16 * 16];
  rc_image_prep p = {3, 16, 16, 20};
  st = rc_image_prepare(out, &im, &p, &e);
  rc_image_free(&im);
  return st;
}

#endif
