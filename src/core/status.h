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

/* The library's short names for rc_err_set and rc_err_prefix
 * (recoup/status.h): set e's code and message, returning the code so callers
 * can `return rc__fail(...)`; prefix the message already in e with context
 * ("file.onnx: node 'x'"). */
#define rc__fail rc_err_set
#define rc__wrap rc_err_prefix

/* RC_TRY is in recoup/status.h. */

#endif
