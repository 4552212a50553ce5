#include "core/log.h"

#include "core/escape.h"

#include <stdarg.h>
#include <stdio.h>

void rc__log(const rc_logger *lg, rc_log_level level, const char *fmt, ...) {
  if (!lg || !lg->fn || level > lg->max_level) return;
  char raw[1024], buf[1024];
  va_list ap;
  va_start(ap, fmt);
  vsnprintf(raw, sizeof raw, fmt, ap);
  va_end(ap);
  lg->fn(lg->user, level, rc__escape(buf, sizeof buf, raw)); /* messages quote names from files */
  
}
