/* Counting the allocations of training steps FIRST_STEP+1 .. LAST_STEP
 * through the library's allocation counter (rc_alloc_set_fail_after, which
 * counts every rc__malloc/calloc/realloc), from a distillation progress
 * callback: pass count_at_steps as the progress hook and a step_counts as
 * its user pointer. Shared by the steady-state allocation tests. */
#ifndef RC_TESTS_STEP_ALLOCS_H
#define RC_TESTS_STEP_ALLOCS_H

#include "recoup/alloc.h"
#include "train/distill.h"

#define FIRST_STEP 10
#define LAST_STEP 60

typedef struct step_counts {
  long allocations; /* made between FIRST_STEP and LAST_STEP */
  int seen_first, seen_last;
} step_counts;

static void count_at_steps(void *user, const rc_distill_progress *p) {
  step_counts *c = user;
  if (p->event != RC_DISTILL_STEP) return;
  if (p->step == FIRST_STEP) {
    rc_alloc_set_fail_after(0); /* resets the count */
    c->seen_first = 1;
  } else if (p->step == LAST_STEP) {
    c->allocations = rc_alloc_set_fail_after(0);
    c->seen_last = 1;
  }
}

#endif
