#include "onnx/io_decl.h"

#include <string.h>

#include "ir/tensor_proto.h"

static void from_value_info(const Onnx__ValueInfoProto *vi, rc_io_decl *d) {
  memset(d, 0, sizeof *d);
  d->rank = -1;
  const Onnx__TypeProto *tp = vi ? vi->type : NULL;
  if (!tp || tp->value_case != ONNX__TYPE_PROTO__VALUE_TENSOR_TYPE || !tp->tensor_type) return;
  const Onnx__TypeProto__Tensor *tt = tp->tensor_type;
  if (tt->has_elem_type && rc__onnx_dtype_supported(tt->elem_type)) d->dtype = (rc_dtype)tt->elem_type;
  if (!tt->shape || tt->shape->n_dim > RC_MAX_RANK) return;
  d->rank = (int)tt->shape->n_dim;
  for (int k = 0; k < d->rank; k++) {
    const Onnx__TensorShapeProto__Dimension *dim = tt->shape->dim[k];
    d->dims[k] = -1;
    if (dim->value_case == ONNX__TENSOR_SHAPE_PROTO__DIMENSION__VALUE_DIM_VALUE && dim->dim_value >= 0)
      d->dims[k] = dim->dim_value;
    else if (dim->value_case == ONNX__TENSOR_SHAPE_PROTO__DIMENSION__VALUE_DIM_PARAM && dim->dim_param &&
             *dim->dim_param)
      d->dim_names[k] = dim->dim_param;
  }
}

rc_status rc_model_io_decl(const rc_model *m, int is_output, int i, const char *name, rc_io_decl *d, rc_err *e) {
  const Onnx__GraphProto *gp = m && m->proto ? ((const Onnx__ModelProto *)m->proto)->graph : NULL;
  from_value_info(NULL, d);
  if (!gp) return rc__fail(e, RC_ERR_INVALID, "no model");
  if (is_output) {
    if (i < 0 || (size_t)i >= gp->n_output) return rc__fail(e, RC_ERR_INVALID, "%s: no output %d", m->path, i);
    from_value_info(gp->output[i], d);
    return RC_OK;
  }
  for (size_t k = 0; k < gp->n_input; k++)
    if (gp->input[k]->name && !strcmp(gp->input[k]->name, name)) {
      from_value_info(gp->input[k], d);
      return RC_OK;
    }
  return rc__fail(e, RC_ERR_INVALID, "%s: no input '%s'", m->path, name);
}
