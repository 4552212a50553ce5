#include <string.h>

#include "ops/op.h"

typedef struct family {
  const rc_op_def *defs;
  const int *count;
} family;

static const family families[] = {
#define RC_OP_FAMILY_ENTRY(fam) {rc__ops_##fam, &rc__ops_##fam##_count},
    RC_OP_FAMILIES(RC_OP_FAMILY_ENTRY)
#undef RC_OP_FAMILY_ENTRY
};

#define N_FAMILIES ((int)(sizeof families / sizeof families[0]))

static int same_domain(const char *a, const char *b) {
  /* "ai.onnx" is the default domain spelled out. */
  if (!a || !strcmp(a, "ai.onnx")) a = "";
  if (!b || !strcmp(b, "ai.onnx")) b = "";
  return strcmp(a, b) == 0;
}

const rc_op_def *rc__op_find(const char *op_type, const char *domain, int opset) {
  for (int f = 0; f < N_FAMILIES; f++)
    for (int i = 0; i < *families[f].count; i++) {
      const rc_op_def *d = &families[f].defs[i];
      if (strcmp(d->name, op_type) || !same_domain(d->domain, domain)) continue;
      if (opset < d->min_opset || opset > d->max_opset) continue;
      return d;
    }
  return NULL;
}
