/* A large working buffer that lives in memory while it is small and in a
 * memory-mapped temporary file once it would exceed a budget, so the kernel
 * can write its pages out and read them back instead of holding them all. */
#ifndef RC_DATA_SPILL_H
#define RC_DATA_SPILL_H

#include <stddef.h>

#include "core/status.h"

typedef struct rc_spill {
  void *p;
  size_t n;
  int in_file; /* 1: a shared mapping of an unlinked file in `dir` */
} rc_spill;

/* The default budget: a quarter of the machine's physical memory. */
size_t rc_spill_default_budget(void);

/* n bytes, zeroed: heap memory when n <= budget (0 = the default budget),
 * else a file created in dir (removed at once, so nothing is left behind
 * even after a crash) and mapped. Errors name the folder. */
rc_status rc_spill_alloc(rc_spill *b, size_t n, size_t budget, const char *dir, rc_err *e);
void rc_spill_free(rc_spill *b);

#endif
