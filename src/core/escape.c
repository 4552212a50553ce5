#include "core/escape.h"

#include <stdio.h>
#include <string.h>

/* Length of the valid, printable UTF-8 character at s (1-4), or 0 when the
 * byte at s must be escaped. */
static size_t printable_len(const unsigned char *s) {
  unsigned c = s[0];
  if (c >= 0x20 && c < 0x7f) return 1;
  if (c < 0xc2 || c > 0xf4) return 0; /* controls, DEL, stray continuations, overlong leads */
  size_t len = c < 0xe0 ? 2 : c < 0xf0 ? 3 : 4;
  for (size_t i = 1; i < len; i++)
    if ((s[i] & 0xc0) != 0x80) return 0;
  unsigned cp = len == 2 ? (c & 0x1fu) << 6 | (s[1] & 0x3fu)
                : len == 3 ? (c & 0x0fu) << 12 | (s[1] & 0x3fu) << 6 | (s[2] & 0x3fu)
                           : (c & 0x07u) << 18 | (s[1] & 0x3fu) << 12 | (s[2] & 0x3fu) << 6 | (s[3] & 0x3fu);
  if ((len == 3 && cp < 0x800) || (len == 4 && (cp < 0x10000 || cp > 0x10ffff))) return 0; /* overlong */
  if (cp >= 0xd800 && cp <= 0xdfff) return 0;                                             /* surrogates */
  if (cp >= 0x80 && cp <= 0x9f) return 0;                                                 /* C1 controls */
  /* Bidirectional embeddings, overrides and isolates reorder what follows. */
  if ((cp >= 0x202a && cp <= 0x202e) || (cp >= 0x2066 && cp <= 0x2069)) return 0;
  if (cp == 0x2028 || cp == 0x2029) return 0; /* line and paragraph separators */
  return len;
}

char *rc__escape(char *dst, size_t n, const char *src) {
  if (!n) return dst;
  size_t o = 0;
  const unsigned char *s = (const unsigned char *)(src ? src : "");
  while (*s) {
    size_t len = printable_len(s);
    if (len) {
      if (o + len >= n) break;
      memcpy(dst + o, s, len);
      o += len;
      s += len;
    } else {
      if (o + 4 >= n) break;
      snprintf(dst + o, 5, "\\x%02X", *s);
      o += 4;
      s++;
    }
  }
  dst[o] = '\0';
  return dst;
}

int rc__needs_escape(const char *s) {
  const unsigned char *p = (const unsigned char *)(s ? s : "");
  while (*p) {
    size_t len = printable_len(p);
    if (!len) return 1;
    p += len;
  }
  return 0;
}
