/* Allocation hook for fault-injection tests. */
#ifndef RECOUP_ALLOC_H
#define RECOUP_ALLOC_H

#include "recoup/export.h"

/* Make the n-th allocation from now on fail (n >= 1); n = 0 turns failures off.
 * Returns how many allocations have been made since the last call. This is
 * process-wide test instrumentation: the only mutable global in the library. */
RC_API long rc_alloc_set_fail_after(long n);

#endif
