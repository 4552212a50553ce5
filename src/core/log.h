/* Logging through a callback the caller installs; the library never prints. */
#ifndef RC_CORE_LOG_H
#define RC_CORE_LOG_H

#include "recoup/log.h"

void rc__log(const rc_logger *lg, rc_log_level level, const char *fmt, ...)
#if defined(__GNUC__)
    __attribute__((format(printf, 3, 4)))
#endif
    ;

#endif
