/* Synthesised samples for the command line: `recoup synthesize` and
 * `distill --data synth:N` share these. */
#ifndef RC_CLI_SYNTH_H
#define RC_CLI_SYNTH_H

#include <stdint.h>

#include "recoup/synthesize.h"

typedef struct cli_synth_progress_state {
  int tty;
  double last;
} cli_synth_progress_state;

/* Progress on stderr (redrawn on a terminal, every 10% otherwise). */
void cli_synth_progress(void *user, int64_t done, int64_t total, double bn_loss);

/* "synth:N" -> N (> 0); 0 when text is not of that form. */
long cli_synth_count(const char *text);

#endif
