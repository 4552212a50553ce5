/* A growing text buffer for the report's files. Out of memory is sticky:
 * `oom` is set, later additions are dropped, the writer checks it once. */
#ifndef RC_CLI_SBUF_H
#define RC_CLI_SBUF_H

#include <stddef.h>

#include "cli/cli.h"
#include "recoup/status.h"

typedef struct cli_sbuf {
  char *p;
  size_t n, cap;
  int oom;
} cli_sbuf;

void cli_sb_add(cli_sbuf *b, const char *s, size_t n);
void cli_sb_printf(cli_sbuf *b, const char *fmt, ...) CLI_PRINTF(2, 3);
/* Text for HTML and SVG: the five characters with meaning escaped. */
void cli_sb_esc(cli_sbuf *b, const char *s);

#endif
