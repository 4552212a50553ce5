/* Models ready to plan: read (src/onnx), ordered (src/ir) and bound to the
 * kernels (src/ops). Binding lives here, above both the reader and the
 * kernels, so that neither depends on the other. */
#ifndef RC_PLAN_LOAD_H
#define RC_PLAN_LOAD_H

#include <stddef.h>

#include "core/status.h"
#include "ir/ir.h"
#include "onnx/model.h"
#include "recoup/model.h"

/* Order the graph (rc__graph_order), look up each node's op (refusing
 * unsupported ones) and parse its attributes. Messages name the file, node
 * and field. */
rc_status rc__graph_finalize(rc_graph *g, rc_err *e);

/* rc_model_load (declared in recoup/model.h) is rc__model_load_unbound, then
 * rc__graph_finalize: it refuses everything the reader refuses and
 * unsupported ops. */

/* rc_model_load on bytes in memory (the fuzzing entry point). `name` stands
 * for the path in messages; external data is refused, there being no folder
 * to resolve it against. */
rc_status rc_model_load_mem(rc_model **out, const void *buf, size_t n, const char *name,
                            const rc_load_limits *limits, rc_err *e);

#endif
