#include "core/alloc.h"

#include <stdatomic.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "recoup/alloc.h"

/* Fault injection counter. Atomic because OpenMP regions may allocate. It is
 * test instrumentation, not state the library's behaviour depends on. */
static _Atomic long fail_countdown = 0;
static _Atomic long alloc_count = 0;

long rc_alloc_set_fail_after(long n) {
  long made = atomic_exchange(&alloc_count, 0);
  atomic_store(&fail_countdown, n);
  return made;
}

static int should_fail(void) {
  atomic_fetch_add(&alloc_count, 1);
  long c = atomic_load(&fail_countdown);
  if (c <= 0) return 0;
  if (atomic_fetch_sub(&fail_countdown, 1) == 1) return 1;
  return 0;
}

void *rc__malloc(size_t n) {
  if (should_fail()) return NULL;
  return malloc(n ? n : 1);
}

void *rc__calloc(size_t count, size_t size) {
  if (should_fail()) return NULL;
  return calloc(count ? count : 1, size ? size : 1);
}

void *rc__realloc(void *p, size_t n) {
  if (should_fail()) return NULL;
  return realloc(p, n ? n : 1);
}

void rc__free(void *p) { free(p); }

char *rc__strdup(const char *s) {
  size_t n = strlen(s) + 1;
  char *d = rc__malloc(n);
  if (d) memcpy(d, s, n);
  return d;
}

int rc__mul_size(size_t a, size_t b, size_t *out) {
  if (a != 0 && b > SIZE_MAX / a) return 0;
  *out = a * b;
  return 1;
}
