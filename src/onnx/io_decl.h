/* What a model file declares about its graph inputs and outputs: element
 * type and shape, with the names of symbolic dimensions ("N", "batch") that
 * the IR itself keeps only as -1. */
#ifndef RC_ONNX_IO_DECL_H
#define RC_ONNX_IO_DECL_H

#include "onnx/model.h"

/* rc_io_decl is public: recoup/model.h. */

/* The declaration of graph output i (is_output) or of the graph input named
 * `name` (!is_output; i ignored). Fails only on an index out of range. */
rc_status rc_model_io_decl(const rc_model *m, int is_output, int i, const char *name, rc_io_decl *d, rc_err *e);

#endif
