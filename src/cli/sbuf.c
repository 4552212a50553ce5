/* A growing text buffer (cli/sbuf.h). */
#include "cli/sbuf.h"

#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>


void cli_sb_add(cli_sbuf *b, const char *s, size_t n) {
  if (b->oom) return;
  if (b->n + n + 1 > b->cap) {
    size_t cap = b->cap ? b->cap : 4096;
    while (cap < b->n + n + 1) cap *= 2;
    char *p = realloc(b->p, cap);
    if (!p) {
      b->oom = 1;
      return;
    }
    b->p = p;
    b->cap = cap;
  }
  memcpy(b->p + b->n, s, n);
  b->n += n;
  b->p[b->n] = '\0';
}

void cli_sb_printf(cli_sbuf *b, const char *fmt, ...) {
  char small[1024];
  va_list ap;
  va_start(ap, fmt);
  int n = vsnprintf(small, sizeof small, fmt, ap);
  va_end(ap);
  if (n < 0) return;
  if ((size_t)n < sizeof small) {
    cli_sb_add(b, small, (size_t)n);
    return;
  }
  char *big = malloc((size_t)n + 1);
  if (!big) {
    b->oom = 1;
    return;
  }
  va_start(ap, fmt);
  vsnprintf(big, (size_t)n + 1, fmt, ap);
  va_end(ap);
  cli_sb_add(b, big, (size_t)n);
  free(big);
}

/* Text for HTML and SVG: the five characters with meaning escaped. */
void cli_sb_esc(cli_sbuf *b, const char *s) {
  for (; s && *s; s++) {
    switch (*s) {
      case '&': cli_sb_add(b, "&amp;", 5); break;
      case '<': cli_sb_add(b, "&lt;", 4); break;
      case '>': cli_sb_add(b, "&gt;", 4); break;
      case '"': cli_sb_add(b, "&quot;", 6); break;
      case '\'': cli_sb_add(b, "&#39;", 5); break;
      default: cli_sb_add(b, s, 1);
    }
  }
}
