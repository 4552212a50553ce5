/* Internal error helpers. Library code reports errors through rc_err and a
 * returned rc_status; it never prints and never exits. */
#ifndef RC_CORE_STATUS_H
#define RC_CORE_STATUS_H

#include "recoup/status.h"

#if defined(__GNUC__)
#define RC_PRINTF(a, b) __attribute__((format(printf, a, b)))
#else
#define RC_PRINTF(a, b)
#endif

/* Set e's code and message; returns code so callers can `return rc__fail(...)`. */
rc_status rc__fail(rc_err *e, rc_status code, const char *fmt, ...) RC_PRINTF(3, 4);
/* Prefix the message already in e with context ("file.onnx: node 'x'"). */
rc_status rc__wrap(rc_err *e, const char *fmt, ...) RC_PRINTF(2, 3);
void rc__err_clear(rc_err *e);

/* RC_TRY is in recoup/status.h. */

#endif
