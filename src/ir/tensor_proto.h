/* ONNX's TensorProto and native tensors, at the protobuf level: the
 * size-capped protobuf-c allocator, external data, decoding and encoding.
 * It sits in the IR layer because both the model reader (src/onnx:
 * initializers, attribute tensors) and the data readers (src/data: *.pb data
 * files) decode TensorProto messages, and neither may call the other. */
#ifndef RC_IR_TENSOR_PROTO_H
#define RC_IR_TENSOR_PROTO_H

#include <stddef.h>
#include <stdint.h>

#include <protobuf-c/protobuf-c.h>

#include "core/status.h"
#include "onnx/onnx.pb-c.h"
#include "recoup/tensor.h"

#if defined(__BYTE_ORDER__) && __BYTE_ORDER__ != __ORDER_LITTLE_ENDIAN__
#error "recoup reads ONNX raw_data (little-endian) by copying: a big-endian port needs byte swaps"
#endif

/* ---- capped allocator (pb_alloc.c) ---- */

/* A protobuf-c allocator that goes through rc__malloc and refuses to hand out
 * more than `cap` bytes in total, so a small hostile file cannot make the
 * unpacker allocate without bound. */
typedef struct rc__pb_alloc {
  ProtobufCAllocator base; /* first: passed to protobuf-c */
  size_t used, cap;
  int hit_cap;
  int out_of_memory; /* rc__malloc failed: not the file's fault */
} rc__pb_alloc;

void rc__pb_alloc_init(rc__pb_alloc *a, size_t cap);
/* Cap for a message read from a file of n bytes (see pb_alloc.c for the factor). */
size_t rc__pb_alloc_cap(size_t file_bytes);
/* Allocator for freeing what rc__pb_alloc unpacked (no state needed). */
ProtobufCAllocator *rc__pb_free_allocator(void);

/* ---- external data (external.c) ---- */

/* Where an external tensor's bytes are: the file (resolved, inside dir) and
 * the byte range. length < 0 when the file gives none (= to the end). */
typedef struct rc__external_ref {
  const char *location;
  int64_t offset, length;
} rc__external_ref;

/* Parse the external_data entries of t; error names the tensor. */
rc_status rc__external_parse(const Onnx__TensorProto *t, const char *tensor_name, rc__external_ref *r,
                             rc_err *e);
/* Read the bytes of an external tensor, resolved against dir, refusing
 * absolute locations, ".." escapes, symlinks leading outside dir and ranges
 * past the file's end. want = expected byte count (checked against the
 * range). Memory from rc__malloc. */
rc_status rc__external_read(const char *dir, const char *tensor_name, const rc__external_ref *r,
                            size_t want, uint8_t **data, rc_err *e);

/* ---- tensors (tensor_proto.c) ---- */

/* Context for decoding one TensorProto. */
typedef struct rc__decode_ctx {
  const char *file;         /* for messages */
  const char *dir;          /* external data folder; NULL refuses external data */
  size_t max_tensor_bytes;
  size_t *total_bytes;      /* running sum checked against max_total (may be NULL) */
  size_t max_total_bytes;
  int max_rank;
  /* Where decoded data goes: arena for graphs, rc__malloc for .pb files. */
  void *(*alloc)(void *alloc_data, size_t n);
  void *alloc_data;
} rc__decode_ctx;

/* Decode t (named `what` in messages, e.g. "initializer 'w'") into out:
 * dtype, dims, data in native layout (int4/uint4 unpacked one per byte,
 * bool as 0/1). Raw and typed fields must hold exactly the element count.
 * On failure out->data may hold memory from ctx->alloc: the caller frees it
 * (arena callers free nothing). */
rc_status rc__tensor_decode(const Onnx__TensorProto *t, const char *what, const rc__decode_ctx *ctx,
                            rc_tensor *out, rc_err *e);

/* Unpack one serialised TensorProto (buf, n bytes, named `name` in messages)
 * and decode it into out, data from rc__malloc returned in *owned (free with
 * rc__free). External data resolves against dir; dir NULL refuses it.
 * Refuses tensors over max_bytes. */
rc_status rc__tensorproto_decode_bytes(const uint8_t *buf, size_t n, const char *name, const char *dir,
                                       rc_tensor *out, void **owned, size_t max_bytes, rc_err *e);

/* Bytes of raw_data for n elements of dtype in the file (int4 packs two per
 * byte). 0 with *ok = 0 on overflow or unsupported dtype. */
size_t rc__raw_bytes(rc_dtype dt, int64_t numel, int *ok);

/* 1 for ONNX data types recoup holds in memory (see rc_dtype). */
int rc__onnx_dtype_supported(int32_t dt);
/* Name of any ONNX data type number, for messages. */
const char *rc__onnx_dtype_label(int32_t dt);

/* Encode `t` (whose dtype may differ from file_dtype only when t is float32
 * and file_dtype is another float or an integer type) as raw little-endian
 * bytes of file_dtype. Integer targets need integral in-range values; NaN is
 * refused. Returns rc__malloc'd bytes. Errors name `what`. */
rc_status rc__tensor_encode_raw(const rc_tensor *t, rc_dtype file_dtype, const char *what,
                                uint8_t **raw, size_t *n, rc_err *e);

uint16_t rc__float_to_half(float f);
float rc__half_to_float(uint16_t h);
uint16_t rc__float_to_bfloat16(float f);

#endif
