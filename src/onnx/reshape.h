/* Structural edits of a loaded model for tools that shrink it (`recoup
 * prune`): an initializer whose dims change, an integer attribute (a Conv's
 * group), value_info that no longer holds. rc_model_save only replaces the
 * data of initializers whose shape is unchanged; these edits instead go into
 * the kept message itself, so every later save writes them. Node attributes
 * parsed at load time (n->params) are not re-parsed: save the model and load
 * the written file to plan the edited graph. */
#ifndef RC_ONNX_RESHAPE_H
#define RC_ONNX_RESHAPE_H

#include "onnx/model.h"

/* Give initializer `value` new dims and data: t has the value's rank and
 * dtype (data in native layout, copied). Both m->graph (decl dims and data,
 * in the graph arena) and the kept message (dims, data embedded as raw_data,
 * external data dropped) are updated. */
rc_status rc_model_resize_initializer(rc_model *m, int value, const rc_tensor *t, rc_err *e);

/* Set INT attribute `name` of graph node `node` (index into m->graph.nodes),
 * adding it when the node has none; refuses an attribute of another type. */
rc_status rc_model_set_attr_int(rc_model *m, int node, const char *name, int64_t value, rc_err *e);

/* Drop the value_info entries of a value whose shape changed, so shape
 * inference recomputes it instead of meeting a stale declaration. */
rc_status rc_model_forget_value_info(rc_model *m, int value, rc_err *e);

#endif
