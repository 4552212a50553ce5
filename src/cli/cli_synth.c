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

rc_status cli_synth_make(rc_array *out, rc_synth_stats *stats, rc_model *teacher, const rc_synth_config *c,
                         rc_err *e) {
  memset(out, 0, sizeof *out);
  RC_TRY(rc_synth_check(teacher, e));
  const rc_graph *g = &teacher->graph;
  rc_tensor t = g->values[g->inputs[0]].decl;
  t.dims[0] = c->count;
  t.dtype = RC_DTYPE_FLOAT;
  size_t bytes = rc_tensor_nbytes(&t);
  float *data = bytes == SIZE_MAX ? NULL : malloc(bytes);
  if (!data) return rc_err_set(e, RC_ERR_NOMEM, "out of memory for %lld synthesised samples", (long long)c->count);
  rc_status s = rc_synthesize(data, stats, teacher, c, e);
  if (s != RC_OK) {
    free(data);
    return s;
  }
  t.data = data;
  out->t = t;
  out->owned = data;
  return RC_OK;
}

long cli_synth_count(const char *text) {
  if (strncmp(text, "synth:", 6)) return 0;
  char *end;
  long n = strtol(text + 6, &end, 10);
  return *end || n < 1 ? -1 : n;
}
