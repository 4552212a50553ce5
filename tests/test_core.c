/* Core module: status text, arena alignment and reuse, tensor sizes, the
 * allocation fault hook. */
#include <stdint.h>

#include "core/alloc.h"
#include "core/arena.h"
#include "core/status.h"
#include "recoup/alloc.h"
#include "recoup/tensor.h"
#include "test.h"

static void status_texts(void) {
  CHECK_STR_EQ(rc_strerror(RC_OK), "success");
  CHECK_STR_EQ(rc_strerror(RC_ERR_FORMAT), "malformed file");
  CHECK_STR_EQ(rc_strerror(-999), "unknown status");
  rc_err e;
  CHECK_INT(rc__fail(&e, RC_ERR_SHAPE, "node '%s' bad", "c1"), RC_ERR_SHAPE);
  rc__wrap(&e, "%s", "m.onnx");
  CHECK_STR_EQ(e.msg, "m.onnx: node 'c1' bad");
}

static void arena_alignment_and_blocks(void) {
  rc_arena a;
  rc__arena_init(&a, 128);
  for (int i = 1; i < 100; i++) {
    unsigned char *p = rc__arena_alloc(&a, (size_t)i * 7);
    CHECK_NOT_NULL(p);
    CHECK_INT((uintptr_t)p % 64, 0);
    memset(p, 0xab, (size_t)i * 7);
  }
  char *s = rc__arena_strdup(&a, "conv1.weight");
  CHECK_STR_EQ(s, "conv1.weight");
  rc__arena_free(&a);
  CHECK_NULL(a.head);
}

static void tensor_sizes(void) {
  rc_tensor t = {RC_DTYPE_FLOAT, 4, {2, 3, 4, 5}, NULL};
  CHECK_INT(rc_tensor_numel(&t), 120);
  CHECK_INT(rc_tensor_nbytes(&t), 480);
  char buf[64];
  CHECK_STR_EQ(rc_shape_str(&t, buf, sizeof buf), "(2, 3, 4, 5)");
  rc_tensor huge = {RC_DTYPE_FLOAT, 3, {INT64_MAX / 2, 4, 4}, NULL};
  CHECK_EQ(rc_tensor_nbytes(&huge), SIZE_MAX);
  rc_tensor neg = {RC_DTYPE_FLOAT, 1, {-3}, NULL};
  CHECK_EQ(rc_tensor_nbytes(&neg), SIZE_MAX);
  CHECK_INT(rc_dtype_size(RC_DTYPE_INT4), 1);
  CHECK_STR_EQ(rc_dtype_name(RC_DTYPE_UINT4), "uint4");
}

static void alloc_fault_hook(void) {
  rc_alloc_set_fail_after(2);
  void *a = rc__malloc(8);
  void *b = rc__malloc(8);
  void *c = rc__malloc(8);
  CHECK_NOT_NULL(a);
  CHECK_NULL(b);
  CHECK_NOT_NULL(c);
  rc__free(a);
  rc__free(c);
  rc_alloc_set_fail_after(0);
  size_t out;
  CHECK(!rc__mul_size(SIZE_MAX / 2, 3, &out));
  CHECK(rc__mul_size(6, 7, &out));
  CHECK_EQ(out, 42);
}

int main(void) {
  RUN(status_texts);
  RUN(arena_alignment_and_blocks);
  RUN(tensor_sizes);
  RUN(alloc_fault_hook);
  return TEST_REPORT();
}
