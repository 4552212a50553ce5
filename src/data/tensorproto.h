/* ONNX TensorProto data files (*.pb, the format of ONNX's own test data). The
 * protobuf-level decoding is shared with the model reader from the IR layer
 * (ir/tensor_proto.h); this is the file reader on top of it. */
#ifndef RC_DATA_TENSORPROTO_H
#define RC_DATA_TENSORPROTO_H

#include <stddef.h>

#include "core/status.h"
#include "recoup/tensor.h"

/* Read one TensorProto file into a tensor whose data is allocated with
 * rc__malloc and returned in *owned (free with rc__free). External data
 * resolves against the file's folder. Refuses tensors over max_bytes. */
rc_status rc__tensorproto_file_read(const char *path, rc_tensor *out, void **owned, size_t max_bytes,
                                    rc_err *e);
/* The same on bytes in memory (the fuzzing entry point); external data is
 * refused. `name` stands for the path in messages. */
rc_status rc__tensorproto_mem_read(const void *buf, size_t n, const char *name, rc_tensor *out,
                                   void **owned, size_t max_bytes, rc_err *e);

#endif
