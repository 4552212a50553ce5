/* Writing a model back: the message as loaded, with only the changed
 * initializers replaced. The loaded message is patched in place for the
 * pack and restored afterwards, so a model can be saved many times.
 *
 * External data: an unchanged external tensor stays a reference when the
 * output goes to the model's own folder (the referenced file is still there).
 * Written anywhere else, the reference would dangle, so its bytes are read
 * (with the same checks as loading) and embedded as raw_data. Changed
 * initializers are always embedded. */
#define _POSIX_C_SOURCE 200809L
#define _DEFAULT_SOURCE

#include <errno.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>

#include "core/alloc.h"
#include "core/file.h"
#include "ir/tensor_proto.h"
#include "onnx/model.h"

typedef struct patch {
  Onnx__TensorProto *t;
  Onnx__TensorProto saved;
  uint8_t *buf;
} patch;

typedef struct patch_list {
  patch *p;
  size_t n, cap;
} patch_list;

static void restore_all(patch_list *pl) {
  for (size_t i = pl->n; i-- > 0;) {
    *pl->p[i].t = pl->p[i].saved;
    rc__free(pl->p[i].buf);
  }
  rc__free(pl->p);
  pl->p = NULL;
  pl->n = pl->cap = 0;
}

/* Replace t's data with raw bytes (taking ownership of buf) until restore. */
static int patch_raw(patch_list *pl, Onnx__TensorProto *t, uint8_t *buf, size_t n) {
  if (pl->n == pl->cap) {
    size_t cap = pl->cap ? pl->cap * 2 : 8;
    patch *p = rc__realloc(pl->p, cap * sizeof *p);
    if (!p) return 0;
    pl->p = p;
    pl->cap = cap;
  }
  patch *p = &pl->p[pl->n++];
  p->t = t;
  p->saved = *t;
  p->buf = buf;
  t->n_float_data = t->n_int32_data = t->n_int64_data = t->n_double_data = t->n_uint64_data = 0;
  t->n_string_data = 0;
  t->n_external_data = 0;
  t->has_data_location = 0;
  t->data_location = ONNX__TENSOR_PROTO__DATA_LOCATION__DEFAULT;
  t->has_raw_data = 1;
  t->raw_data.len = n;
  t->raw_data.data = buf;
  return 1;
}

static int is_external(const Onnx__TensorProto *t) {
  return t->has_data_location && t->data_location == ONNX__TENSOR_PROTO__DATA_LOCATION__EXTERNAL;
}

static int already_patched(const patch_list *pl, const Onnx__TensorProto *t) {
  for (size_t i = 0; i < pl->n; i++)
    if (pl->p[i].t == t) return 1;
  return 0;
}

static rc_status embed_external(rc_model *m, patch_list *pl, Onnx__TensorProto *t, rc_err *e) {
  if (!is_external(t) || already_patched(pl, t)) return RC_OK;
  const char *name = t->name ? t->name : "";
  int ok;
  int64_t numel = 1;
  for (size_t i = 0; i < t->n_dims; i++) numel *= t->dims[i]; /* validated at load */
  size_t want = rc__raw_bytes((rc_dtype)t->data_type, numel, &ok);
  rc__external_ref ref;
  uint8_t *buf = NULL;
  rc_status st = rc__external_parse(t, name, &ref, e);
  if (st == RC_OK) st = rc__external_read(m->dir, name, &ref, want, &buf, e);
  if (st != RC_OK) return rc__wrap(e, "%s", m->path);
  if (!patch_raw(pl, t, buf, want)) {
    rc__free(buf);
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", m->path);
  }
  return RC_OK;
}

/* Every external tensor of the graph: initializers and attribute tensors. */
static rc_status embed_all_external(rc_model *m, patch_list *pl, rc_err *e) {
  Onnx__GraphProto *gp = ((Onnx__ModelProto *)m->proto)->graph;
  for (size_t i = 0; i < gp->n_initializer; i++) RC_TRY(embed_external(m, pl, gp->initializer[i], e));
  for (size_t i = 0; i < gp->n_node; i++)
    for (size_t k = 0; k < gp->node[i]->n_attribute; k++) {
      Onnx__AttributeProto *a = gp->node[i]->attribute[k];
      if (a->t) RC_TRY(embed_external(m, pl, a->t, e));
    }
  return RC_OK;
}

static int same_file(const char *a, const char *b) {
  struct stat sa, sb;
  return stat(a, &sa) == 0 && stat(b, &sb) == 0 && sa.st_dev == sb.st_dev && sa.st_ino == sb.st_ino;
}

/* 1 when the output lands in the folder the model's external data lives in. */
static rc_status same_folder(const rc_model *m, const char *path, int *same, rc_err *e) {
  char *d = rc__path_dir(path);
  if (!d) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", path);
  *same = m->dir && same_file(d, m->dir); /* models read from memory have no folder */
  rc__free(d);
  return RC_OK;
}

/* With references kept, the output must not overwrite a referenced file. */
static rc_status check_not_external_target(rc_model *m, const char *path, rc_err *e) {
  Onnx__GraphProto *gp = ((Onnx__ModelProto *)m->proto)->graph;
  for (size_t i = 0; i < gp->n_initializer; i++) {
    Onnx__TensorProto *t = gp->initializer[i];
    if (!is_external(t)) continue;
    rc__external_ref ref;
    if (rc__external_parse(t, t->name ? t->name : "", &ref, e) != RC_OK) continue;
    size_t n = strlen(m->dir) + strlen(ref.location) + 2;
    char *p = rc__malloc(n);
    if (!p) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", path);
    snprintf(p, n, "%s/%s", m->dir, ref.location);
    int clash = same_file(p, path);
    rc__free(p);
    if (clash)
      return rc__fail(e, RC_ERR_INVALID,
                      "%s: is the external data file of initializer '%s'; write the model elsewhere",
                      path, t->name ? t->name : "");
  }
  return RC_OK;
}

static rc_status patch_changed(rc_model *m, patch_list *pl, const int *changed, int n_changed,
                               rc_err *e) {
  Onnx__GraphProto *gp = ((Onnx__ModelProto *)m->proto)->graph;
  const rc_graph *g = &m->graph;
  for (int c = 0; c < n_changed; c++) {
    int vi = changed[c];
    if (vi < 0 || vi >= g->n_values)
      return rc__fail(e, RC_ERR_INVALID, "%s: changed value index %d is out of range", m->path, vi);
    const rc_value *v = &g->values[vi];
    if (v->kind != RC_VALUE_INITIALIZER || v->init_index < 0 || (size_t)v->init_index >= gp->n_initializer)
      return rc__fail(e, RC_ERR_INVALID, "%s: value '%s' is not an initializer and cannot be saved",
                      m->path, v->name);
    Onnx__TensorProto *t = gp->initializer[v->init_index];
    if (already_patched(pl, t)) continue;
    char what[320];
    snprintf(what, sizeof what, "%s: initializer '%.256s'", m->path, v->name);
    int shape_ok = v->decl.rank == (int)t->n_dims;
    for (int d = 0; shape_ok && d < v->decl.rank; d++) shape_ok = v->decl.dims[d] == t->dims[d];
    if (!shape_ok) {
      char a[128];
      return rc__fail(e, RC_ERR_SHAPE, "%s: shape %s differs from the file's", what,
                      rc_shape_str(&v->decl, a, sizeof a));
    }
    uint8_t *buf;
    size_t n;
    RC_TRY(rc__tensor_encode_raw(&v->decl, (rc_dtype)t->data_type, what, &buf, &n, e));
    if (!patch_raw(pl, t, buf, n)) {
      rc__free(buf);
      return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", m->path);
    }
  }
  return RC_OK;
}

static rc_status refuse_input_path(const rc_model *m, const char *path, rc_err *e) {
  int same = same_file(path, m->path);
  if (!same) {
    char *a = realpath(path, NULL), *b = realpath(m->path, NULL);
    same = a && b && !strcmp(a, b);
    free(a);
    free(b);
  }
  if (same)
    return rc__fail(e, RC_ERR_INVALID,
                    "%s: is the model that was read; recoup never overwrites its input, choose "
                    "another output path", path);
  return RC_OK;
}

rc_status rc_model_save(rc_model *m, const char *path, const int *changed, int n_changed, rc_err *e) {
  if (!m || !m->proto) return rc__fail(e, RC_ERR_INVALID, "no model to save");
  if (!path || !*path) return rc__fail(e, RC_ERR_INVALID, "no output path given");
  if (n_changed < 0 || (n_changed > 0 && !changed))
    return rc__fail(e, RC_ERR_INVALID, "%s: invalid list of changed initializers", path);
  RC_TRY(refuse_input_path(m, path, e));
  patch_list pl = {0};
  int same = 0;
  rc_status st = same_folder(m, path, &same, e);
  if (st == RC_OK) st = patch_changed(m, &pl, changed, n_changed, e);
  if (st == RC_OK) st = same ? check_not_external_target(m, path, e) : embed_all_external(m, &pl, e);
  uint8_t *out = NULL;
  size_t size = 0;
  if (st == RC_OK) {
    const ProtobufCMessage *msg = m->proto;
    size = protobuf_c_message_get_packed_size(msg);
    out = rc__malloc(size);
    if (!out) st = rc__fail(e, RC_ERR_NOMEM, "%s: out of memory for %zu bytes", path, size);
    else if (protobuf_c_message_pack(msg, out) != size)
      st = rc__fail(e, RC_ERR_FORMAT, "%s: the model message did not serialise", path);
  }
  restore_all(&pl);
  if (st == RC_OK) st = rc__write_atomic(path, out, size, e);
  rc__free(out);
  return st;
}
