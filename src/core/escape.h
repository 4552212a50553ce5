/* Text taken from files (tensor, node and array names, paths, metadata) may
 * hold any bytes. Before it reaches a terminal, a log or a report it is made
 * visible: control characters (C0, DEL and the C1 range), bytes that are not
 * valid UTF-8, and the bidirectional-override characters become \xNN
 * escapes, one per byte. Printable UTF-8 and backslashes pass unchanged, so
 * escaping twice changes nothing. */
#ifndef RC_CORE_ESCAPE_H
#define RC_CORE_ESCAPE_H

#include <stddef.h>

/* Escaped `src` into dst (n bytes, always NUL-terminated when n > 0; cut at
 * a whole character or escape). Returns dst. */
char *rc__escape(char *dst, size_t n, const char *src);

/* 1 when rc__escape would change s. */
int rc__needs_escape(const char *s);

#endif
