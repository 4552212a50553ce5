/* recoup/synthesize.h: synthesised inputs as an array of the teacher's input shape. */
#include "recoup/synthesize.h"

#include <stdint.h>
#include <string.h>

#include "core/alloc.h"
#include "core/status.h"
#include "train/synthesize.h"

rc_status rc_synthesize_array(rc_array *out, rc_synth_stats *stats, rc_model *teacher, const rc_synth_config *c,
                              rc_err *e) {
  memset(out, 0, sizeof *out);
  RC_TRY(rc_synth_check(teacher, e));
  const rc_graph *g = &teacher->graph;
  rc_tensor t = g->values[g->inputs[0]].decl;
  t.dims[0] = c->count;
  t.dtype = RC_DTYPE_FLOAT;
  size_t bytes = rc_tensor_nbytes(&t);
  float *data = bytes == SIZE_MAX ? NULL : rc__malloc(bytes);
  if (!data) return rc_err_set(e, RC_ERR_NOMEM, "out of memory for %lld synthesised samples", (long long)c->count);
  rc_status s = rc_synthesize(data, stats, teacher, c, e);
  if (s != RC_OK) {
    rc__free(data);
    return s;
  }
  t.data = data;
  out->t = t;
  out->owned = data;
  return RC_OK;
}
