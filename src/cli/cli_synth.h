/* Synthesised samples for the command line: `recoup synthesize` and
 * `distill --data synth:N` share these. */
#ifndef RC_CLI_SYNTH_H
#define RC_CLI_SYNTH_H

#include "recoup/data.h"
#include "train/synthesize.h"

typedef struct cli_synth_progress_state {
  int tty;
  double last;
} cli_synth_progress_state;

/* Progress on stderr (redrawn on a terminal, every 10% otherwise). */
void cli_synth_progress(void *user, int64_t done, int64_t total, double bn_loss);

/* out becomes a float32 array (count, the teacher input's per-sample shape). */
rc_status cli_synth_make(rc_array *out, rc_synth_stats *stats, rc_model *teacher, const rc_synth_config *c,
                         rc_err *e);

/* "synth:N" -> N (> 0); 0 when text is not of that form. */
long cli_synth_count(const char *text);

#endif
