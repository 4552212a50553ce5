#define _POSIX_C_SOURCE 200809L /* link, unlink under -std=c11 */
/* Distillation checkpoints in a portable, versioned format (checkpoint.h;
 * the fields are documented in DEVELOPERS.md). Numbers in the JSON header
 * are printed by cJSON with up to 17 significant digits, which round-trips
 * every double; non-finite values are the strings "nan", "inf", "-inf". */
#include "train/checkpoint.h"

#include <cjson/cJSON.h>
#include <inttypes.h>
#include <math.h>
#include <stdio.h>
#include <string.h>
#include <unistd.h>

#include "core/alloc.h"
#include "data/npy_write.h"
#include "core/file.h"
#include "recoup/data.h"

#define FORMAT_NAME "recoup-checkpoint"
#define HEADER_MEMBER "header"
#define HEADER_MAX_BYTES ((size_t)16 << 20)
#define NAME_CAP 48
/* The largest integer a JSON number (a double) holds exactly. */
#define JSON_INT_MAX 9007199254740992.0

/* ---- Fingerprint ------------------------------------------------------------ */

static uint64_t fnv_u64(uint64_t h, uint64_t v, int bytes) {
  for (int i = 0; i < bytes; i++) h = (h ^ ((v >> (8 * i)) & 0xffu)) * 1099511628211ull;
  return h;
}

uint64_t rc__ckpt_fp_i64(uint64_t h, const int64_t *v, size_t n) {
  for (size_t i = 0; i < n; i++) h = fnv_u64(h, (uint64_t)v[i], 8);
  return h;
}

static uint64_t bits64(double v) {
  uint64_t u;
  memcpy(&u, &v, sizeof u);
  return u;
}

static uint32_t bits32(float v) {
  uint32_t u;
  memcpy(&u, &v, sizeof u);
  return u;
}

uint64_t rc__ckpt_fp_f64(uint64_t h, const double *v, size_t n) {
  for (size_t i = 0; i < n; i++) h = fnv_u64(h, bits64(v[i]), 8);
  return h;
}

uint64_t rc__ckpt_fp_f32(uint64_t h, const float *v, size_t n) {
  for (size_t i = 0; i < n; i++) h = fnv_u64(h, bits32(v[i]), 4);
  return h;
}

uint64_t rc__ckpt_fp_bytes(uint64_t h, const void *p, size_t n) {
  const unsigned char *b = p;
  for (size_t i = 0; i < n; i++) h = fnv_u64(h, b[i], 1);
  return h;
}

/* ---- Writing ------------------------------------------------------------------ */

static cJSON *real(double v) {
  if (isnan(v)) return cJSON_CreateString("nan");
  if (isinf(v)) return cJSON_CreateString(v > 0 ? "inf" : "-inf");
  return cJSON_CreateNumber(v);
}

static void put_real(cJSON *o, const char *key, double v) { cJSON_AddItemToObject(o, key, real(v)); }

static cJSON *metrics_json(const rc_metrics *m) {
  cJSON *o = cJSON_CreateObject();
  cJSON_AddNumberToObject(o, "n", (double)m->n);
  cJSON_AddBoolToObject(o, "has_labels", m->has_labels);
  cJSON_AddBoolToObject(o, "has_ref", m->has_ref);
  put_real(o, "top1", m->top1);
  put_real(o, "top5", m->top5);
  put_real(o, "agreement", m->agreement);
  put_real(o, "kl", m->kl);
  put_real(o, "ce", m->ce);
  cJSON_AddBoolToObject(o, "outputs", m->outputs);
  put_real(o, "miou_ref", m->miou_ref);
  put_real(o, "miou_labels", m->miou_labels);
  put_real(o, "value_mad", m->value_mad);
  return o;
}

static char *header_json(const rc_ckpt_run *run, const loop_state *ls, const double *epoch_loss,
                         const rc_metrics *epoch_val, rc_params *ps) {
  char buf[32];
  cJSON *h = cJSON_CreateObject();
  cJSON_AddStringToObject(h, "format", FORMAT_NAME);
  cJSON_AddNumberToObject(h, "version", RC_CKPT_VERSION);
  snprintf(buf, sizeof buf, "%016" PRIx64, run->fingerprint);
  cJSON_AddStringToObject(h, "fingerprint", buf);
  cJSON *pos = cJSON_AddObjectToObject(h, "position");
  cJSON_AddNumberToObject(pos, "step", (double)ls->step);
  cJSON_AddNumberToObject(pos, "epoch", (double)ls->epoch);
  cJSON_AddNumberToObject(pos, "batch", (double)ls->batch);
  cJSON_AddNumberToObject(pos, "epoch_steps", (double)ls->ep_steps);
  put_real(pos, "epoch_loss_sum", ls->ep_loss);
  cJSON *order = cJSON_AddObjectToObject(h, "data_order");
  cJSON_AddStringToObject(order, "generator", "pcg32");
  snprintf(buf, sizeof buf, "%" PRIu64, run->seed);
  cJSON_AddStringToObject(order, "seed", buf);
  cJSON_AddNumberToObject(order, "stream", (double)ls->epoch);
  cJSON *lr = cJSON_AddObjectToObject(h, "learning_rate");
  put_real(lr, "scale", ls->lr_scale);
  cJSON_AddNumberToObject(lr, "optimizer_steps", (double)rc_params_steps(ps));
  cJSON_AddNumberToObject(h, "rollbacks", (double)ls->rollbacks);
  cJSON_AddBoolToObject(h, "stopped", ls->stopped != 0);
  cJSON *best = cJSON_AddObjectToObject(h, "best");
  cJSON_AddNumberToObject(best, "epoch", (double)ls->best_epoch);
  cJSON_AddItemToObject(best, "metrics", metrics_json(&ls->best));
  cJSON *hist = cJSON_AddArrayToObject(h, "history");
  for (int64_t i = 0; i < ls->n_epochs; i++) {
    cJSON *ep = cJSON_CreateObject();
    put_real(ep, "loss", epoch_loss[i]);
    cJSON_AddItemToObject(ep, "metrics", metrics_json(&epoch_val[i]));
    cJSON_AddItemToArray(hist, ep);
  }
  cJSON *tr = cJSON_AddObjectToObject(h, "trace");
  cJSON *steps = cJSON_AddArrayToObject(tr, "step"), *losses = cJSON_AddArrayToObject(tr, "loss");
  for (int64_t i = 0; i < ls->n_trace; i++) {
    cJSON_AddItemToArray(steps, cJSON_CreateNumber((double)ls->trace_step[i]));
    cJSON_AddItemToArray(losses, real(ls->trace_loss[i]));
  }
  cJSON_AddNumberToObject(tr, "window_steps", (double)ls->window_steps);
  put_real(tr, "window_loss", ls->window_loss);
  cJSON *snaps = cJSON_AddArrayToObject(h, "snapshots");
  for (int i = 0; i < rc_params_snapshot_count(ps); i++) {
    int saved;
    int64_t st;
    rc_params_snapshot_state(ps, i, &saved, &st);
    cJSON *s = cJSON_CreateObject();
    cJSON_AddBoolToObject(s, "saved", saved);
    cJSON_AddNumberToObject(s, "optimizer_steps", (double)st);
    cJSON_AddItemToArray(snaps, s);
  }
  cJSON *arrays = cJSON_AddArrayToObject(h, "arrays");
  for (int i = 0; i < rc_params_state_count(ps); i++) {
    char name[NAME_CAP];
    rc_params_state_array(ps, i, name, sizeof name);
    cJSON *a = cJSON_CreateObject();
    cJSON_AddStringToObject(a, "name", name);
    cJSON_AddStringToObject(a, "dtype", "<f4");
    cJSON_AddItemToObject(a, "shape", cJSON_CreateIntArray((const int[]){(int)rc_params_total(ps)}, 1));
    cJSON_AddItemToArray(arrays, a);
  }
  char *text = cJSON_PrintUnformatted(h);
  cJSON_Delete(h);
  return text;
}

rc_status rc__ckpt_write(const char *path, const rc_ckpt_run *run, const loop_state *ls,
                         const double *epoch_loss, const rc_metrics *epoch_val, rc_params *ps, rc_err *e) {
  int n = 1 + rc_params_state_count(ps);
  char *text = header_json(run, ls, epoch_loss, epoch_val, ps);
  char(*names)[NAME_CAP] = rc__calloc((size_t)n, sizeof *names);
  const char **name_ptrs = rc__calloc((size_t)n, sizeof *name_ptrs);
  rc_tensor *ts = rc__calloc((size_t)n, sizeof *ts);
  rc_status s = RC_OK;
  if (!text || !names || !name_ptrs || !ts) {
    s = rc__fail(e, RC_ERR_NOMEM, "%s: out of memory writing a checkpoint", path);
    goto out;
  }
  snprintf(names[0], NAME_CAP, HEADER_MEMBER);
  ts[0] = (rc_tensor){RC_DTYPE_UINT8, 1, {(int64_t)strlen(text)}, text};
  for (int i = 1; i < n; i++) {
    float *data = rc_params_state_array(ps, i - 1, names[i], NAME_CAP);
    ts[i] = (rc_tensor){RC_DTYPE_FLOAT, 1, {(int64_t)rc_params_total(ps)}, data};
  }
  for (int i = 0; i < n; i++) name_ptrs[i] = names[i];
  /* Keep the previous checkpoint as PATH.1. PATH itself must exist at every
   * instant (a kill may come at any time), so the old one is hard-linked to
   * PATH.1 and the new one renamed over PATH, never PATH moved away first. */
  char prev[4096], prev_tmp[4200];
  snprintf(prev, sizeof prev, "%s.1", path);
  snprintf(prev_tmp, sizeof prev_tmp, "%s.1.tmp", path);
  unlink(prev_tmp);
  if (link(path, prev_tmp) == 0) rename(prev_tmp, prev);
  s = rc_npz_write(path, name_ptrs, ts, n, e);
out:
  cJSON_free(text);
  rc__free(names);
  rc__free(name_ptrs);
  rc__free(ts);
  return s;
}

/* ---- Reading ------------------------------------------------------------------ */

typedef struct header_reader {
  const char *path;
  rc_err *e;
  rc_status s; /* the first failure; later reads are skipped */
} header_reader;

static const cJSON *field(header_reader *r, const cJSON *o, const char *key, const char *what) {
  if (r->s != RC_OK) return NULL;
  const cJSON *v = cJSON_GetObjectItemCaseSensitive(o, key);
  if (!v) r->s = rc__fail(r->e, RC_ERR_FORMAT, "%s: checkpoint header lacks '%s' (%s)", r->path, key, what);
  return v;
}

static int64_t get_int(header_reader *r, const cJSON *o, const char *key, int64_t lo, int64_t hi) {
  const cJSON *v = field(r, o, key, "an integer");
  if (!v) return 0;
  double d = v->valuedouble;
  if (!cJSON_IsNumber(v) || d != floor(d) || fabs(d) > JSON_INT_MAX || d < (double)lo || d > (double)hi) {
    r->s = rc__fail(r->e, RC_ERR_FORMAT, "%s: checkpoint header: '%s' must be an integer in [%lld, %lld]", r->path,
                    key, (long long)lo, (long long)hi);
    return 0;
  }
  return (int64_t)d;
}

static double real_of(header_reader *r, const cJSON *v, const char *key) {
  if (cJSON_IsNumber(v)) return v->valuedouble;
  if (cJSON_IsString(v)) {
    if (!strcmp(v->valuestring, "nan")) return NAN;
    if (!strcmp(v->valuestring, "inf")) return INFINITY;
    if (!strcmp(v->valuestring, "-inf")) return -INFINITY;
  }
  if (r->s == RC_OK)
    r->s = rc__fail(r->e, RC_ERR_FORMAT, "%s: checkpoint header: '%s' must be a number or \"nan\", \"inf\", \"-inf\"",
                    r->path, key);
  return 0;
}

static double get_real(header_reader *r, const cJSON *o, const char *key) {
  const cJSON *v = field(r, o, key, "a number");
  return v ? real_of(r, v, key) : 0;
}

static int get_bool(header_reader *r, const cJSON *o, const char *key) {
  const cJSON *v = field(r, o, key, "true or false");
  if (v && !cJSON_IsBool(v))
    r->s = rc__fail(r->e, RC_ERR_FORMAT, "%s: checkpoint header: '%s' must be true or false", r->path, key);
  return v && cJSON_IsTrue(v);
}

static const cJSON *get_kind(header_reader *r, const cJSON *o, const char *key, int array) {
  const cJSON *v = field(r, o, key, array ? "an array" : "an object");
  if (v && !(array ? cJSON_IsArray(v) : cJSON_IsObject(v))) {
    r->s = rc__fail(r->e, RC_ERR_FORMAT, "%s: checkpoint header: '%s' must be %s", r->path, key,
                    array ? "an array" : "an object");
    return NULL;
  }
  return v;
}

static void get_metrics(header_reader *r, const cJSON *o, const char *key, rc_metrics *m) {
  const cJSON *v = get_kind(r, o, key, 0);
  if (!v) return;
  m->n = get_int(r, v, "n", 0, INT64_MAX);
  m->has_labels = get_bool(r, v, "has_labels");
  m->has_ref = get_bool(r, v, "has_ref");
  m->top1 = get_real(r, v, "top1");
  m->top5 = get_real(r, v, "top5");
  m->agreement = get_real(r, v, "agreement");
  m->kl = get_real(r, v, "kl");
  m->ce = get_real(r, v, "ce");
  m->outputs = get_bool(r, v, "outputs");
  m->miou_ref = get_real(r, v, "miou_ref");
  m->miou_labels = get_real(r, v, "miou_labels");
  m->value_mad = get_real(r, v, "value_mad");
}

static const char *get_string(header_reader *r, const cJSON *o, const char *key) {
  const cJSON *v = field(r, o, key, "a string");
  if (v && !cJSON_IsString(v)) {
    r->s = rc__fail(r->e, RC_ERR_FORMAT, "%s: checkpoint header: '%s' must be a string", r->path, key);
    return NULL;
  }
  return v ? v->valuestring : NULL;
}

/* Format, version and run: the checks that say "not this file" rather than
 * "damaged", each with its own message. */
static void check_identity(header_reader *r, const cJSON *h, const rc_ckpt_run *run) {
  const char *fmt = get_string(r, h, "format");
  if (r->s != RC_OK || strcmp(fmt, FORMAT_NAME)) {
    if (r->s == RC_OK)
      r->s = rc__fail(r->e, RC_ERR_FORMAT, "%s: not a recoup checkpoint (format is not '" FORMAT_NAME "')", r->path);
    return;
  }
  const cJSON *ver = field(r, h, "version", "an integer");
  if (ver && (!cJSON_IsNumber(ver) || ver->valuedouble != RC_CKPT_VERSION))
    r->s = rc__fail(r->e, RC_ERR_UNSUPPORTED, "%s: checkpoint format version %g; this recoup reads version %d",
                    r->path, cJSON_IsNumber(ver) ? ver->valuedouble : -1.0, RC_CKPT_VERSION);
  char want[32];
  snprintf(want, sizeof want, "%016" PRIx64, run->fingerprint);
  const char *fp = get_string(r, h, "fingerprint");
  if (r->s == RC_OK && strcmp(fp, want))
    r->s = rc__fail(r->e, RC_ERR_INVALID,
                    "%s: checkpoint of a different run (teacher, student, data or settings differ)", r->path);
  const cJSON *order = get_kind(r, h, "data_order", 0);
  char seed[32];
  snprintf(seed, sizeof seed, "%" PRIu64, run->seed);
  const char *gen = order ? get_string(r, order, "generator") : NULL;
  const char *got = order ? get_string(r, order, "seed") : NULL;
  if (r->s == RC_OK && (strcmp(gen, "pcg32") || strcmp(got, seed)))
    r->s = rc__fail(r->e, RC_ERR_INVALID, "%s: checkpoint's data order (%s seed %s) is not this run's (pcg32 seed %s)",
                    r->path, gen, got, seed);
}

static void read_history(header_reader *r, const cJSON *h, const rc_ckpt_run *run, loop_state *ls,
                         double *epoch_loss, rc_metrics *epoch_val) {
  const cJSON *hist = get_kind(r, h, "history", 1);
  if (!hist) return;
  int n = cJSON_GetArraySize(hist);
  if (n > run->max_epochs) {
    r->s = rc__fail(r->e, RC_ERR_FORMAT, "%s: checkpoint history of %d epochs, this run has %lld", r->path, n,
                    (long long)run->max_epochs);
    return;
  }
  ls->n_epochs = n;
  int i = 0;
  for (const cJSON *ep = hist->child; ep && r->s == RC_OK; ep = ep->next, i++) {
    epoch_loss[i] = get_real(r, ep, "loss");
    get_metrics(r, ep, "metrics", &epoch_val[i]);
  }
}

static void read_trace(header_reader *r, const cJSON *h, loop_state *ls) {
  const cJSON *tr = get_kind(r, h, "trace", 0);
  const cJSON *steps = tr ? get_kind(r, tr, "step", 1) : NULL, *losses = tr ? get_kind(r, tr, "loss", 1) : NULL;
  if (r->s != RC_OK) return;
  int n = cJSON_GetArraySize(steps);
  if (n > RC_DISTILL_TRACE_MAX || cJSON_GetArraySize(losses) != n) {
    r->s = rc__fail(r->e, RC_ERR_FORMAT, "%s: checkpoint header: 'trace' needs equal step and loss lists of at most %d",
                    r->path, RC_DISTILL_TRACE_MAX);
    return;
  }
  ls->n_trace = n;
  const cJSON *a = steps->child, *b = losses->child;
  for (int i = 0; i < n; i++, a = a->next, b = b->next) {
    double d = a->valuedouble;
    if (!cJSON_IsNumber(a) || d != floor(d) || d < 0 || d > JSON_INT_MAX) {
      r->s = rc__fail(r->e, RC_ERR_FORMAT, "%s: checkpoint header: trace step %d is not a step number", r->path, i);
      return;
    }
    ls->trace_step[i] = (int64_t)d;
    ls->trace_loss[i] = real_of(r, b, "trace.loss");
  }
  ls->window_steps = get_int(r, tr, "window_steps", 0, INT64_MAX);
  ls->window_loss = get_real(r, tr, "window_loss");
}

static void read_snapshots(header_reader *r, const cJSON *h, rc_params *ps) {
  const cJSON *snaps = get_kind(r, h, "snapshots", 1);
  if (!snaps) return;
  if (cJSON_GetArraySize(snaps) != rc_params_snapshot_count(ps)) {
    r->s = rc__fail(r->e, RC_ERR_FORMAT, "%s: checkpoint has %d snapshot slots, this run %d", r->path,
                    cJSON_GetArraySize(snaps), rc_params_snapshot_count(ps));
    return;
  }
  int i = 0;
  for (const cJSON *s = snaps->child; s && r->s == RC_OK; s = s->next, i++) {
    int saved = get_bool(r, s, "saved");
    int64_t steps = get_int(r, s, "optimizer_steps", 0, INT64_MAX);
    if (r->s == RC_OK) rc_params_snapshot_set_state(ps, i, saved, steps);
  }
}

static void read_header(header_reader *r, const cJSON *h, const rc_ckpt_run *run, loop_state *ls,
                        double *epoch_loss, rc_metrics *epoch_val, rc_params *ps) {
  check_identity(r, h, run);
  const cJSON *pos = get_kind(r, h, "position", 0);
  if (pos) {
    ls->step = get_int(r, pos, "step", 0, INT64_MAX);
    ls->epoch = get_int(r, pos, "epoch", 0, run->max_epochs);
    ls->batch = get_int(r, pos, "batch", 0, INT64_MAX);
    ls->ep_steps = get_int(r, pos, "epoch_steps", 0, INT64_MAX);
    ls->ep_loss = get_real(r, pos, "epoch_loss_sum");
  }
  const cJSON *order = get_kind(r, h, "data_order", 0);
  if (order && get_int(r, order, "stream", 0, INT64_MAX) != ls->epoch && r->s == RC_OK)
    r->s = rc__fail(r->e, RC_ERR_FORMAT, "%s: checkpoint's data order stream differs from its epoch", r->path);
  const cJSON *lr = get_kind(r, h, "learning_rate", 0);
  if (lr) {
    ls->lr_scale = get_real(r, lr, "scale");
    int64_t steps = get_int(r, lr, "optimizer_steps", 0, INT64_MAX);
    if (r->s == RC_OK) rc_params_set_steps(ps, steps);
  }
  ls->rollbacks = get_int(r, h, "rollbacks", 0, INT64_MAX);
  ls->stopped = get_bool(r, h, "stopped");
  const cJSON *best = get_kind(r, h, "best", 0);
  if (best) {
    ls->best_epoch = get_int(r, best, "epoch", 0, run->max_epochs);
    get_metrics(r, best, "metrics", &ls->best);
  }
  read_history(r, h, run, ls, epoch_loss, epoch_val);
  read_trace(r, h, ls);
  read_snapshots(r, h, ps);
}

/* Each state array: float32, one dimension of the store's size. */
static rc_status read_arrays(const char *path, const unsigned char *buf, size_t n, rc_params *ps, rc_err *e) {
  size_t total = rc_params_total(ps);
  for (int i = 0; i < rc_params_state_count(ps); i++) {
    char name[NAME_CAP];
    float *dst = rc_params_state_array(ps, i, name, sizeof name);
    rc_array a;
    /* Room for the widest dtype, so that a wrong one gets the message below. */
    RC_TRY(rc_array_read_mem(&a, buf, n, RC_DATA_NPZ, path, name, total * sizeof(double), e));
    rc_status s = RC_OK;
    if (a.t.dtype != RC_DTYPE_FLOAT || a.t.rank != 1 || a.t.dims[0] != (int64_t)total)
      s = rc__fail(e, RC_ERR_FORMAT, "%s: checkpoint array '%s' is %s of %lld elements, this run needs float32 of %zu",
                   path, name, rc_dtype_name(a.t.dtype), a.t.rank == 1 ? (long long)a.t.dims[0] : -1LL, total);
    else
      memcpy(dst, a.t.data, total * sizeof(float));
    rc_array_free(&a);
    RC_TRY(s);
  }
  return RC_OK;
}

static rc_status check_container(const char *path, const unsigned char *buf, size_t n, int want_members,
                                 rc_err *e) {
  static const char OLD_MAGIC[] = "recoup-ckpt-v";
  size_t m = sizeof OLD_MAGIC - 1;
  if (n >= m && !memcmp(buf, OLD_MAGIC, m)) {
    char v = n > m && buf[m] >= '0' && buf[m] <= '9' ? (char)buf[m] : '?';
    return rc__fail(e, RC_ERR_UNSUPPORTED,
                    "%s: checkpoint in the raw format of an earlier recoup (build-dependent, version %c); "
                    "this recoup reads format version %d only: resume it with the recoup that wrote it, "
                    "or start the run again",
                    path, v, RC_CKPT_VERSION);
  }
  if (rc_data_detect(buf, n) != RC_DATA_NPZ)
    return rc__fail(e, RC_ERR_FORMAT, "%s: not a recoup checkpoint (not an .npz archive)", path);
  char **names;
  int count;
  RC_TRY(rc_npz_list_mem(&names, &count, buf, n, path, e));
  int has_header = 0;
  for (int i = 0; i < count; i++) has_header |= !strcmp(names[i], HEADER_MEMBER ".npy");
  rc_data_names_free(names);
  if (!has_header)
    return rc__fail(e, RC_ERR_FORMAT, "%s: an .npz archive without a recoup checkpoint header (member '%s')", path,
                    HEADER_MEMBER);
  if (count != want_members)
    return rc__fail(e, RC_ERR_FORMAT, "%s: checkpoint holds %d arrays, this run's state needs %d", path, count,
                    want_members);
  return RC_OK;
}

rc_status rc__ckpt_read(const char *path, const rc_ckpt_run *run, loop_state *ls, double *epoch_loss,
                        rc_metrics *epoch_val, rc_params *ps, rc_err *e) {
  int n_arrays = rc_params_state_count(ps);
  size_t max = HEADER_MAX_BYTES + (size_t)n_arrays * (rc_params_total(ps) * sizeof(float) + 4096);
  uint8_t *buf;
  size_t n;
  RC_TRY(rc__file_read_all(path, max, &buf, &n, e));
  rc_array head = {0};
  cJSON *h = NULL;
  rc_status s = check_container(path, buf, n, 1 + n_arrays, e);
  if (s == RC_OK) s = rc_array_read_mem(&head, buf, n, RC_DATA_NPZ, path, HEADER_MEMBER, HEADER_MAX_BYTES, e);
  if (s == RC_OK && (head.t.dtype != RC_DTYPE_UINT8 || head.t.rank != 1))
    s = rc__fail(e, RC_ERR_FORMAT, "%s: checkpoint header is not a one-dimensional uint8 array", path);
  if (s == RC_OK && !(h = cJSON_ParseWithLength(head.t.data, (size_t)head.t.dims[0])))
    s = rc__fail(e, RC_ERR_FORMAT, "%s: checkpoint header is not valid JSON", path);
  if (s == RC_OK) {
    header_reader r = {path, e, RC_OK};
    loop_state got = *ls;
    read_header(&r, h, run, &got, epoch_loss, epoch_val, ps);
    s = r.s;
    if (s == RC_OK) *ls = got;
  }
  if (s == RC_OK) s = read_arrays(path, buf, n, ps, e);
  if (s == RC_OK) rc_params_zero_grad(ps);
  cJSON_Delete(h);
  rc_array_free(&head);
  rc__free(buf);
  return s;
}
