/* ONNX files in and out. A model is the graph IR plus the message it was read
 * from, kept so that saving writes back everything the caller did not change:
 * names, attributes, doc strings, metadata, opset imports, value_info and
 * unknown fields. */
#ifndef RC_ONNX_MODEL_H
#define RC_ONNX_MODEL_H

#include <stddef.h>

#include "core/status.h"
#include "ir/ir.h"
#include "recoup/model.h"

/* The handle of recoup/model.h. */
struct rc_model {
  rc_graph graph;
  void *proto;          /* Onnx__ModelProto*, opaque outside src/onnx */
  char *path;           /* as given to rc_model_load */
  char *dir;            /* folder that external data resolves against */
  size_t file_bytes;
};

/* Read path; limits may be NULL for the defaults. Refuses IR versions outside
 * 3..10, default-domain opsets outside 9..21, and external data that escapes
 * the model's folder or runs past its file's end. Errors name the file and
 * the node or field. The graph is as in the file: nodes in file order, ops
 * not looked up, attributes not parsed. rc_model_load (plan/load.h) adds
 * those steps; this alone is for tests and tools that inspect the structure
 * of files whose ops recoup may not run. */
rc_status rc__model_load_unbound(rc_model **out, const char *path, const rc_load_limits *limits,
                                 rc_err *e);

/* rc__model_load_unbound on bytes in memory. `name` stands for the path in
 * messages; external data is refused, there being no folder to resolve it
 * against. */
rc_status rc__model_load_mem_unbound(rc_model **out, const void *buf, size_t n, const char *name,
                                     const rc_load_limits *limits, rc_err *e);

/* Write the model to path: the loaded message with the initializers listed in
 * `changed` (value indices) replaced by their current data in graph.values
 * (converted back to the file's dtype: float stays float32, int8/uint8 as
 * bytes, int4/uint4 packed two per byte, int32 as int32). Unchanged
 * initializers keep their exact bytes. External data: changed initializers
 * are embedded; unchanged ones stay references when path is in the model's
 * own folder (refusing to overwrite a referenced data file) and are embedded
 * when it is anywhere else, where the reference would dangle. NaN in a
 * changed float initializer, or a float value off an integer initializer's
 * grid or range, is refused. The write goes to a temp file in path's folder, is flushed and
 * fsync'd, then renamed over path; on any failure path is left as it was.
 * Refuses to write over the file the model was read from. */
RC_API rc_status rc_model_save(rc_model *m, const char *path, const int *changed, int n_changed, rc_err *e);

RC_API void rc_model_free(rc_model *m);

/* ---- Editing the kept message (edit.c) ----
 * For tools that rewrite a model's structure (quantize). Edits change only
 * m->proto, the message rc_model_save writes; m->graph keeps describing the
 * file as it was read (its init_index entries follow removed initializers,
 * so saving changed initializers still works). The usual flow: read facts
 * from m->graph, edit, rc_model_edit_sort, rc_model_save(m, path, NULL, 0),
 * then load the written file to run it. Nodes are addressed by their index
 * in the message's node list (file order, which edits may change); names are
 * copied. Lookups are linear scans: for one-off rewrites, not hot loops. */

/* Index of the node that outputs `value`, or -1. */
int rc_model_edit_producer(const rc_model *m, const char *value);
/* 1 if name is a tensor (input, output, initializer, node input or output) or node name. */
int rc_model_edit_name_used(const rc_model *m, const char *name);
/* base, or base_1, base_2, ... : the first name not in use, into buf. */
rc_status rc_model_edit_unique_name(const rc_model *m, const char *base, char *buf, size_t n, rc_err *e);
/* Append an initializer holding t (t->dtype is the file's dtype: float32,
 * integer types, int4/uint4 held one byte per element and packed two per
 * byte on write). Refuses a name in use and IR versions below 4 (where
 * initializers must also be graph inputs). */
rc_status rc_model_edit_add_initializer(rc_model *m, const char *name, const rc_tensor *t, rc_err *e);
/* Append a node in the default domain (name may be NULL or ""; an input
 * "" is an absent optional input). Attributes: INT, FLOAT, STRING, INTS. */
rc_status rc_model_edit_add_node(rc_model *m, const char *op_type, const char *name, const char *const *inputs,
                                 int n_in, const char *const *outputs, int n_out, const rc_attr *attrs,
                                 int n_attrs, rc_err *e);
/* slot may equal the node's input count: appends an optional input. */
rc_status rc_model_edit_set_input(rc_model *m, int node, int slot, const char *name, rc_err *e);
/* Refuses a name another node already outputs. */
rc_status rc_model_edit_set_output(rc_model *m, int node, int slot, const char *name, rc_err *e);
/* Every node input reading `from` reads `to` instead (graph outputs are
 * left alone); *count (may be NULL) receives how many were changed. */
rc_status rc_model_edit_rewire(rc_model *m, const char *from, const char *to, int *count, rc_err *e);
rc_status rc_model_edit_remove_node(rc_model *m, int node, rc_err *e);
/* Remove initializers no node or graph output reads (and their graph-input
 * entries), and value_info entries of names that no longer exist. Returns
 * the number of initializers removed. */
int rc_model_edit_drop_unused(rc_model *m);
/* Reorder nodes topologically (stable: a sorted list is left as it is), as
 * ONNX requires; refuses cycles and values nobody produces. */
rc_status rc_model_edit_sort(rc_model *m, rc_err *e);

/* rc_model_metadata and rc_model_edit_set_metadata are public: recoup/model.h. */

#endif
