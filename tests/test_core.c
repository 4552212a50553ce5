/* Core module: status text, arena alignment and reuse, tensor sizes, the
 * allocation fault hook, atomic writes, escaping names, comparing paths as
 * files. */
#define _DEFAULT_SOURCE /* mkdtemp, symlink, link */
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <sys/stat.h>
#include <unistd.h>

#include "core/alloc.h"
#include "core/arena.h"
#include "core/escape.h"
#include "core/file.h"
#include "core/path.h"
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

/* Escaping text from files. What is valid UTF-8 follows RFC 3629 (overlong
 * forms, surrogates and code points past U+10FFFF are not); the C1 range and
 * the bidirectional controls are Unicode's (U+0080..U+009F, U+202A..U+202E,
 * U+2066..U+2069). Both sides are printed escaped by the check. */
static void escape_case(const char *in, const char *want) {
  char got[256], twice[256];
  rc__escape(got, sizeof got, in);
  rc__escape(twice, sizeof twice, got);
  if (strcmp(got, want) || strcmp(twice, got)) {
    fprintf(stderr, "escape: got \"%s\", want \"%s\" (again: \"%s\")\n", got, want, twice);
    CHECK(0);
  }
  CHECK_INT(rc__needs_escape(in), strcmp(in, want) != 0);
}

static void escape_names(void) {
  escape_case("conv1/weight", "conv1/weight");
  escape_case("caf\xc3\xa9 \xe2\x82\xac \xf0\x9f\x98\x80", "caf\xc3\xa9 \xe2\x82\xac \xf0\x9f\x98\x80");
  escape_case("a\x1b[31mb\nc\rd\te\x7f", "a\\x1B[31mb\\x0Ac\\x0Dd\\x09e\\x7F");
  escape_case("bad\xff\xfe", "bad\\xFF\\xFE");
  escape_case("\xc0\x80", "\\xC0\\x80");                 /* overlong NUL */
  escape_case("\xe0\x80\xaf", "\\xE0\\x80\\xAF");         /* overlong '/' */
  escape_case("\xed\xa0\x80", "\\xED\\xA0\\x80");         /* surrogate U+D800 */
  escape_case("\xf4\x90\x80\x80", "\\xF4\\x90\\x80\\x80"); /* U+110000 */
  escape_case("\xc2\x9b", "\\xC2\\x9B");                 /* C1 CSI */
  escape_case("x\xe2\x80\xaey", "x\\xE2\\x80\\xAEy");     /* U+202E right-to-left override */
  escape_case("cut\xe2\x82", "cut\\xE2\\x82");             /* truncated sequence */
  escape_case("already \\x1B", "already \\x1B");
  char small[8];
  rc__escape(small, sizeof small, "ab\x1b\x1b");
  CHECK_STR_EQ(small, "ab\\x1B"); /* cut at a whole escape */
  rc_err e;
  rc__fail(&e, RC_ERR_FORMAT, "node '%s'", "n\x1b[2J");
  CHECK_STR_EQ(e.msg, "node 'n\\x1B[2J'");
}

/* Outputs compared with inputs as files: links, "./", "d/.." and files not
 * yet written. */
static void same_file_paths(void) {
  char dir[] = "/tmp/recoup_core_XXXXXX";
  CHECK_NOT_NULL(mkdtemp(dir));
  char a[128], lnk[128], hard[128], dotted[128], other[128], missing[128], missing2[128];
  snprintf(a, sizeof a, "%s/a.npy", dir);
  snprintf(lnk, sizeof lnk, "%s/link.npy", dir);
  snprintf(hard, sizeof hard, "%s/hard.npy", dir);
  snprintf(dotted, sizeof dotted, "%s/./sub/../a.npy", dir);
  snprintf(other, sizeof other, "%s/b.npy", dir);
  snprintf(missing, sizeof missing, "%s/new.npy", dir);
  snprintf(missing2, sizeof missing2, "%s/sub/../new.npy", dir);
  char sub[128];
  snprintf(sub, sizeof sub, "%s/sub", dir);
  CHECK_EQ(mkdir(sub, 0755), 0);
  FILE *f = fopen(a, "wb");
  CHECK_NOT_NULL(f);
  if (f) fclose(f);
  f = fopen(other, "wb");
  if (f) fclose(f);
  CHECK_EQ(symlink("a.npy", lnk), 0);
  CHECK_EQ(link(a, hard), 0);
  CHECK_INT(rc__path_same_file(a, a), 1);
  CHECK_INT(rc__path_same_file(lnk, a), 1);
  CHECK_INT(rc__path_same_file(hard, a), 1);
  CHECK_INT(rc__path_same_file(dotted, a), 1);
  CHECK_INT(rc__path_same_file(other, a), 0);
  CHECK_INT(rc__path_same_file(missing, a), 0);
  CHECK_INT(rc__path_same_file(missing, missing2), 1); /* neither exists yet */
  const char *ins[2] = {other, a}, *labels[2] = {"--ref", "--data"};
  rc_err e;
  CHECK_INT(rc__path_refuse_inputs("--out", lnk, ins, labels, 2, &e), RC_ERR_INVALID);
  CHECK_STR_CONTAINS(e.msg, "(--data): refusing to overwrite an input");
  CHECK_INT(rc__path_refuse_inputs("--out", missing, ins, labels, 2, &e), RC_OK);
  unlink(lnk);
  unlink(hard);
  unlink(a);
  unlink(other);
  rmdir(sub);
  rmdir(dir);
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
  CHECK_NOT_NULL(mkdtemp(dir));
  snprintf(path, sizeof path, "%s/kept.txt", dir);
  snprintf(fresh, sizeof fresh, "%s/fresh.txt", dir);
  snprintf(victim, sizeof victim, "%s/victim.txt", dir);
  snprintf(planted, sizeof planted, "%s.tmp.%ld", path, (long)getpid());
  rc_err e = {0};
  CHECK_INT(rc__write_atomic(path, "one", 3, &e), RC_OK);
  CHECK_EQ(chmod(path, 0604), 0);
  CHECK_INT(rc__write_atomic(victim, "victim", 6, &e), RC_OK);
  CHECK_EQ(symlink(victim, planted), 0);
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
  RUN(escape_names);
  RUN(same_file_paths);
  return TEST_REPORT();
}
