/* Replays the fuzz inputs in ordinary builds (release and the sanitizer
 * build of scripts/test.sh) through the same entry points the libFuzzer
 * targets use (tests/fuzz/fuzz_entries.h):
 *   tests/fuzz/regressions/<target>/*  inputs that once crashed, hung or
 *       tripped a sanitizer: each must now end with any status, no signal,
 *       no sanitizer report, no leak (the ASan build checks the last two);
 *   tests/fuzz/corpus/<target>/*  the seeds, made from the published formats
 *       by scripts/make_fuzz_corpus.py (numpy and the onnx package): each
 *       must be read successfully, so the fuzzers start from valid files,
 *       except refused_* seeds (big-endian, Fortran order), which must be
 *       refused with an error status. */
#define _DEFAULT_SOURCE

#include <dirent.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "fuzz/fuzz_entries.h"
#include "plan/load.h"
#include "test.h"

typedef int (*entry_fn)(const uint8_t *, size_t);

static const struct {
  const char *name;
  entry_fn fn;
} targets[] = {{"onnx", rc_fuzz_onnx},
               {"npy", rc_fuzz_npy},
               {"npz", rc_fuzz_npz},
               {"idx", rc_fuzz_idx},
               {"tensorproto", rc_fuzz_tensorproto},
               {"image", rc_fuzz_image}};

static const char *source_dir(void) {
  const char *s = getenv("RECOUP_SOURCE_DIR");
  return s ? s : ".";
}

static uint8_t *read_file(const char *path, size_t *n) {
  FILE *f = fopen(path, "rb");
  if (!f) return NULL;
  size_t cap = 4096, len = 0;
  uint8_t *buf = malloc(cap);
  size_t got;
  while (buf && (got = fread(buf + len, 1, cap - len, f)) > 0) {
    len += got;
    if (len == cap) {
      uint8_t *nb = realloc(buf, cap * 2);
      if (!nb) {
        free(buf);
        buf = NULL;
      }
      buf = nb;
      cap *= 2;
    }
  }
  fclose(f);
  *n = len;
  return buf;
}

static int by_name(const void *a, const void *b) {
  return strcmp(*(char *const *)a, *(char *const *)b);
}

/* Runs every file of folder kind/<target> through the target's entry; with
 * must_pass, each must return RC_OK (refused_*: an error). Returns the
 * number of files run. */
static int replay_folder(const char *kind, int must_pass) {
  int files = 0;
  for (size_t t = 0; t < sizeof targets / sizeof targets[0]; t++) {
    char dir[4096];
    snprintf(dir, sizeof dir, "%s/tests/fuzz/%s/%s", source_dir(), kind, targets[t].name);
    DIR *d = opendir(dir);
    if (!d) continue;
    char *names[1024];
    int n = 0;
    struct dirent *ent;
    while ((ent = readdir(d)) && n < 1024)
      if (ent->d_name[0] != '.') names[n++] = strdup(ent->d_name);
    closedir(d);
    qsort(names, (size_t)n, sizeof names[0], by_name);
    for (int i = 0; i < n; i++) {
      char path[8192];
      snprintf(path, sizeof path, "%s/%s", dir, names[i]);
      size_t len = 0;
      uint8_t *buf = read_file(path, &len);
      CHECK_NOT_NULL(buf);
      if (buf) {
        int st = targets[t].fn(buf, len);
        int want_ok = strncmp(names[i], "refused_", 8) != 0;
        if (must_pass && (st == RC_OK) != want_ok) {
          fprintf(stderr, "seed %s: status %d (%s)\n", path, st, rc_strerror(st));
          CHECK(0);
        }
        files++;
      }
      free(buf);
      free(names[i]);
    }
  }
  return files;
}

static void regressions_end_cleanly(void) {
  int n = replay_folder("regressions", 0);
  printf("%d regression inputs replayed\n", n);
  CHECK_GT(n, 0);
}

static void seeds_are_valid_files(void) {
  int n = replay_folder("corpus", 1);
  printf("%d seed inputs read\n", n);
  CHECK_GE(n, 5);
}

/* A model whose ConstantOfShape asks for 198M floats at plan time: the
 * planner refuses it against its byte limit before allocating, naming the
 * node (the fuzzer found it spending seconds zeroing 792 MB). */
static void plan_limit_refuses_huge_constant(void) {
  char path[4096];
  snprintf(path, sizeof path, "%s/tests/fuzz/regressions/onnx/constant_of_shape_792mb.onnx", source_dir());
  size_t n = 0;
  uint8_t *buf = read_file(path, &n);
  CHECK_NOT_NULL(buf);
  if (!buf) return;
  rc_err e;
  rc_model *m = NULL;
  CHECK_INT(rc_model_load_mem(&m, buf, n, "huge.onnx", NULL, &e), RC_OK);
  if (m) {
    rc_tensor in = m->graph.values[m->graph.inputs[0]].decl;
    rc_plan_opts o = {0};
    o.max_bytes = (size_t)64 << 20;
    rc_plan *p = NULL;
    CHECK_INT(rc_plan_init(&p, &m->graph, &in, &o, &e), RC_ERR_LIMIT);
    CHECK_STR_CONTAINS(e.msg, "ConstantOfShape");
    CHECK_NULL(p);
    rc_plan_free(p);
  }
  rc_model_free(m);
  free(buf);
}

int main(void) {
  RUN(regressions_end_cleanly);
  RUN(plan_limit_refuses_huge_constant);
  RUN(seeds_are_valid_files);
  return TEST_REPORT();
}
