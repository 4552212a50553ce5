/* Core module: status text, arena alignment and reuse, tensor sizes, the
 * allocation fault hook, atomic writes. */
#define _DEFAULT_SOURCE /* mkdtemp, symlink */
#include <stdint.h>
#include <sys/stat.h>
#include <unistd.h>

#include "core/alloc.h"
#include "core/arena.h"
#include "core/file.h"
#include "core/status.h"
#include "recoup/alloc.h"
#include "recoup/tensor.h"
#include "test.h"

static void status_texts(void) {
  CHECK(!strcmp(rc_strerror(RC_OK), "success"));
  CHECK(!strcmp(rc_strerror(RC_ERR_FORMAT), "malformed file"));
  CHECK(!strcmp(rc_strerror(-999), "unknown status"));
  rc_err e;
  CHECK_INT(rc__fail(&e, RC_ERR_SHAPE, "node '%s' bad", "c1"), RC_ERR_SHAPE);
  rc__wrap(&e, "%s", "m.onnx");
  CHECK(!strcmp(e.msg, "m.onnx: node 'c1' bad"));
}

static void arena_alignment_and_blocks(void) {
  rc_arena a;
  rc__arena_init(&a, 128);
  for (int i = 1; i < 100; i++) {
    unsigned char *p = rc__arena_alloc(&a, (size_t)i * 7);
    CHECK(p != NULL);
    CHECK_INT((uintptr_t)p % 64, 0);
    memset(p, 0xab, (size_t)i * 7);
  }
  char *s = rc__arena_strdup(&a, "conv1.weight");
  CHECK(!strcmp(s, "conv1.weight"));
  rc__arena_free(&a);
  CHECK(a.head == NULL);
}

static void tensor_sizes(void) {
  rc_tensor t = {RC_DTYPE_FLOAT, 4, {2, 3, 4, 5}, NULL};
  CHECK_INT(rc_tensor_numel(&t), 120);
  CHECK_INT(rc_tensor_nbytes(&t), 480);
  char buf[64];
  CHECK(!strcmp(rc_shape_str(&t, buf, sizeof buf), "(2, 3, 4, 5)"));
  rc_tensor huge = {RC_DTYPE_FLOAT, 3, {INT64_MAX / 2, 4, 4}, NULL};
  CHECK(rc_tensor_nbytes(&huge) == SIZE_MAX);
  rc_tensor neg = {RC_DTYPE_FLOAT, 1, {-3}, NULL};
  CHECK(rc_tensor_nbytes(&neg) == SIZE_MAX);
  CHECK_INT(rc_dtype_size(RC_DTYPE_INT4), 1);
  CHECK(!strcmp(rc_dtype_name(RC_DTYPE_UINT4), "uint4"));
}

static void alloc_fault_hook(void) {
  rc_alloc_set_fail_after(2);
  void *a = rc__malloc(8);
  void *b = rc__malloc(8);
  void *c = rc__malloc(8);
  CHECK(a != NULL);
  CHECK(b == NULL);
  CHECK(c != NULL);
  rc__free(a);
  rc__free(c);
  rc_alloc_set_fail_after(0);
  size_t out;
  CHECK(!rc__mul_size(SIZE_MAX / 2, 3, &out));
  CHECK(rc__mul_size(6, 7, &out) && out == 42);
}

static mode_t mode_of(const char *path) {
  struct stat st;
  return stat(path, &st) == 0 ? st.st_mode & 07777 : (mode_t)-1;
}

static int same_bytes(const char *path, const char *want) {
  uint8_t *got;
  size_t n;
  rc_err e = {0};
  if (rc__file_read_all(path, 1 << 20, &got, &n, &e) != RC_OK) return 0;
  int same = n == strlen(want) && !memcmp(got, want, n);
  if (!same) fprintf(stderr, "  %s holds %.*s, expected %s\n", path, (int)n, (const char *)got, want);
  rc__free(got);
  return same;
}

/* The one atomic writer: the mode of the file it replaces is kept, a new
 * file gets 0666 less the umask (common practice for files a program
 * creates), and the temporary has an unpredictable name, so a link planted
 * at a guessable name (here the "<path>.tmp.<pid>" an earlier report writer
 * used) is never written through. */
static void atomic_write_mode(void) {
  const char *base = getenv("RECOUP_BINARY_DIR");
  char dir[4096], path[4200], fresh[4200], planted[4300], victim[4200];
  snprintf(dir, sizeof dir, "%s/core_write_XXXXXX", base ? base : "/tmp");
  CHECK(mkdtemp(dir) != NULL);
  snprintf(path, sizeof path, "%s/kept.txt", dir);
  snprintf(fresh, sizeof fresh, "%s/fresh.txt", dir);
  snprintf(victim, sizeof victim, "%s/victim.txt", dir);
  snprintf(planted, sizeof planted, "%s.tmp.%ld", path, (long)getpid());
  rc_err e = {0};
  CHECK_INT(rc__write_atomic(path, "one", 3, &e), RC_OK);
  CHECK(chmod(path, 0604) == 0);
  CHECK_INT(rc__write_atomic(victim, "victim", 6, &e), RC_OK);
  CHECK(symlink(victim, planted) == 0);
  CHECK_INT(rc__write_atomic(path, "two", 3, &e), RC_OK);
  CHECK_INT(mode_of(path), 0604);
  CHECK(same_bytes(path, "two"));
  CHECK(same_bytes(victim, "victim"));
  mode_t old = umask(027);
  CHECK_INT(rc__write_atomic(fresh, "new", 3, &e), RC_OK);
  umask(old);
  CHECK_INT(mode_of(fresh), 0640);
  unlink(planted);
  unlink(victim);
  unlink(fresh);
  unlink(path);
  CHECK_INT(rmdir(dir), 0); /* fails if a temporary was left behind */
}

int main(void) {
  RUN(status_texts);
  RUN(arena_alignment_and_blocks);
  RUN(tensor_sizes);
  RUN(alloc_fault_hook);
  RUN(atomic_write_mode);
  return TEST_REPORT();
}
