#include "cli/cli_synth.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

void cli_synth_progress(void *user, int64_t done, int64_t total, double bn_loss) {
  cli_synth_progress_state *ps = user;
  double frac = (double)done / (double)total;
  if (ps->tty) {
    fprintf(stderr, "\r\033[Ksynthesising: step %lld/%lld  statistics loss %.4g", (long long)done, (long long)total,
            bn_loss);
    if (done == total) fprintf(stderr, "\n");
    fflush(stderr);
  } else if (frac - ps->last >= 0.1 || done == total) {
    ps->last = frac;
    fprintf(stderr, "synthesising: step %lld/%lld statistics loss %.4g\n", (long long)done, (long long)total, bn_loss);
  }
}

long cli_synth_count(const char *text) {
  if (strncmp(text, "synth:", 6)) return 0;
  char *end;
  long n = strtol(text + 6, &end, 10);
  return *end || n < 1 ? -1 : n;
}
