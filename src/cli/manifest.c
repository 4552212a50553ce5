/* Batch manifests: reading, checking and turning jobs into distill arguments. */
#define _DEFAULT_SOURCE /* realpath */
#include "cli/manifest.h"

#include <cJSON.h>
#include <errno.h>
#include <limits.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>

#include "cli/cli.h"
#include "cli/cli_data.h"
#include "cli/distill_options.h"
#include "cli/sha256.h"
#include "recoup/distill.h"
#include "recoup/util.h"

#define MANIFEST_MAX_BYTES (16 << 20)
#define MAX_JOBS 100000
#define MAX_NAME 100
#define MAX_LIST 32
#define MAX_INT 9007199254740992.0 /* 2^53: larger integers are not exact in JSON numbers */

/* A manifest key: an option of cli/distill_options.h under its long name
 * with '-' written '_'. */
typedef struct key_def {
  char key[48];
  const cli_option *o;
} key_def;

/* ---- Growing string lists ---------------------------------------------------- */

typedef struct strlist {
  char **v;
  int n, cap;
} strlist;

static rc_status push(strlist *l, const char *s, rc_err *e) {
  if (l->n == l->cap) {
    int cap = l->cap ? 2 * l->cap : 16;
    char **v = realloc(l->v, (size_t)cap * sizeof *v);
    if (!v) return rc_err_set(e, RC_ERR_NOMEM, "out of memory reading the manifest");
    l->v = v;
    l->cap = cap;
  }
  if (!(l->v[l->n] = strdup(s))) return rc_err_set(e, RC_ERR_NOMEM, "out of memory reading the manifest");
  l->n++;
  return RC_OK;
}

static void strlist_free(char **v, int n) {
  for (int i = 0; i < n; i++) free(v[i]);
  free(v);
}

/* ---- Error context ---------------------------------------------------------------- */

typedef struct ctx {
  const char *file;
  char where[160]; /* "defaults" or "job 'name' (jobs[3])" */
  const char *dir;
  int allow_outside;
  rc_err *e;
} ctx;

static rc_status field_error(ctx *c, const char *field, const char *fmt, ...) CLI_PRINTF(3, 4);
static rc_status field_error(ctx *c, const char *field, const char *fmt, ...) {
  char msg[320];
  va_list ap;
  va_start(ap, fmt);
  vsnprintf(msg, sizeof msg, fmt, ap);
  va_end(ap);
  if (field) return rc_err_set(c->e, RC_ERR_INVALID, "manifest %s: %s: field '%s': %s", c->file, c->where, field, msg);
  return rc_err_set(c->e, RC_ERR_INVALID, "manifest %s: %s: %s", c->file, c->where, msg);
}

static const char *type_name(const cJSON *v) {
  if (cJSON_IsString(v)) return "a string";
  if (cJSON_IsNumber(v)) return "a number";
  if (cJSON_IsBool(v)) return "a boolean";
  if (cJSON_IsNull(v)) return "null";
  if (cJSON_IsArray(v)) return "an array";
  if (cJSON_IsObject(v)) return "an object";
  return "an unknown value";
}

/* ---- Paths -------------------------------------------------------------------- */

/* Collapse "." and ".." and repeated '/' in place. Returns 1 when ".." climbs
 * above the start of a relative path (or above '/'). */
static int normalize(char *p) {
  int absolute = p[0] == '/', escaped = 0;
  char *out = p, *seg = p;
  char *starts[PATH_MAX / 2];
  int depth = 0;
  if (absolute) out++, seg++;
  while (*seg) {
    char *end = strchr(seg, '/');
    size_t len = end ? (size_t)(end - seg) : strlen(seg);
    if (len == 0 || (len == 1 && seg[0] == '.')) {
      /* skip */
    } else if (len == 2 && seg[0] == '.' && seg[1] == '.') {
      if (depth > 0) out = starts[--depth];
      else escaped = 1;
    } else if (depth < PATH_MAX / 2) {
      starts[depth++] = out;
      if (out != (absolute ? p + 1 : p)) *out++ = '/';
      memmove(out, seg, len);
      out += len;
    }
    seg += len + (end ? 1 : 0);
  }
  *out = '\0';
  if (out == p) strcpy(p, ".");
  return escaped;
}

static int inside(const char *path, const char *dir) {
  size_t n = strlen(dir);
  return !strcmp(dir, "/") || (!strncmp(path, dir, n) && (path[n] == '/' || path[n] == '\0'));
}

/* Resolve `given` against the manifest folder; refuse absolute paths and
 * escapes unless allowed. `must_exist` = 0 for outputs (their folder is
 * checked for symbolic-link escapes instead). */
static rc_status resolve_path(ctx *c, const char *field, const char *given, int must_exist, char *out) {
  if (!*given) return field_error(c, field, "empty path");
  if (given[0] == '/') {
    if (!c->allow_outside)
      return field_error(c, field, "absolute path '%s' refused (paths are relative to the manifest's folder; "
                         "--allow-outside permits others)", given);
    if (strlen(given) >= PATH_MAX) return field_error(c, field, "path too long");
    strcpy(out, given);
    normalize(out);
  } else {
    if (strlen(c->dir) + strlen(given) + 2 > PATH_MAX) return field_error(c, field, "path too long");
    char rel[PATH_MAX];
    strcpy(rel, given);
    if (normalize(rel) && !c->allow_outside)
      return field_error(c, field, "path '%s' leaves the manifest's folder (--allow-outside permits it)", given);
    snprintf(out, PATH_MAX, "%s/%s", c->dir, rel);
    normalize(out);
  }
  if (c->allow_outside) return RC_OK;
  /* A symbolic link inside the folder may still point out of it. */
  char real[PATH_MAX], probe[PATH_MAX];
  strcpy(probe, out);
  if (!must_exist) {
    char *slash = strrchr(probe, '/');
    if (slash && slash != probe) *slash = '\0';
  }
  if (realpath(probe, real) && !inside(real, c->dir))
    return field_error(c, field, "path '%s' leads out of the manifest's folder through a symbolic link "
                       "(--allow-outside permits it)", given);
  return RC_OK;
}

/* ---- Values --------------------------------------------------------------------- */

static int find_key(const char *key, key_def *k) {
  for (int i = 0; i < CLI_DISTILL_N_OPTIONS; i++) {
    const char *n = cli_distill_options[i].name;
    size_t j = 0;
    while (n[j] && key[j] == (n[j] == '-' ? '_' : n[j])) j++;
    if (n[j] || key[j] || j >= sizeof k->key) continue;
    memcpy(k->key, key, j + 1);
    k->o = &cli_distill_options[i];
    return 1;
  }
  return 0;
}

static void key_of(const cli_option *o, key_def *k) {
  snprintf(k->key, sizeof k->key, "%s", o->name);
  for (char *p = k->key; *p; p++)
    if (*p == '-') *p = '_';
  k->o = o;
}

static rc_status check_number(ctx *c, const key_def *k, const cJSON *v) {
  cli_opt_kind kind = k->o->kind;
  if (!cJSON_IsNumber(v))
    return field_error(c, k->key, "expected %s, got %s", kind == CLI_OPT_INT ? "an integer" : "a number", type_name(v));
  double d = v->valuedouble, lo = k->o->lo, hi = k->o->hi;
  if (!isfinite(d)) return field_error(c, k->key, "not a finite number");
  if (kind == CLI_OPT_INT && hi > MAX_INT) hi = MAX_INT;
  if (kind == CLI_OPT_INT && (d != floor(d) || d < lo || d > hi))
    return field_error(c, k->key, "expected an integer in [%.0f, %.0f], got %.17g", lo, hi, d);
  if (kind == CLI_OPT_NUM && (d < lo || d > hi))
    return field_error(c, k->key, "expected a number in [%g, %g], got %.17g", lo, hi, d);
  if (!strcmp(k->key, "scale") && d == 0) return field_error(c, k->key, "must not be zero");
  return RC_OK;
}

/* Loss terms as distill's --loss text; -1 when the value has the wrong shape. */
static int terms_text(const cJSON *v, char *buf, size_t n) {
  if (cJSON_IsString(v)) {
    snprintf(buf, n, "%s", v->valuestring);
    return 0;
  }
  if (!cJSON_IsObject(v) || !v->child) return -1;
  size_t o = 0;
  const cJSON *it;
  buf[0] = '\0';
  cJSON_ArrayForEach(it, v) {
    if (!cJSON_IsNumber(it) || o >= n) return -1;
    o += (size_t)snprintf(buf + o, n - o, "%s%s=%.9g", o ? "," : "", it->string, it->valuedouble);
  }
  return o < n ? 0 : -1;
}

/* Check one key's value without building anything: used for every key of
 * "defaults" and of each job before arguments are made. */
static rc_status check_value(ctx *c, const key_def *k, const cJSON *v) {
  switch (k->o->kind) {
    case CLI_OPT_PATH:
      if (!cJSON_IsString(v)) return field_error(c, k->key, "expected a path (string), got %s", type_name(v));
      return RC_OK;
    case CLI_OPT_DATA: {
      if (cJSON_IsString(v)) return RC_OK;
      if (!cJSON_IsArray(v) && !cJSON_IsObject(v))
        return field_error(c, k->key, "expected a path, an array of paths or an object of input name to path, "
                           "got %s", type_name(v));
      int n = cJSON_GetArraySize(v);
      if (n == 0) return field_error(c, k->key, "empty");
      if (n > CLI_MAX_DATA) return field_error(c, k->key, "more than %d files", CLI_MAX_DATA);
      const cJSON *it;
      cJSON_ArrayForEach(it, v) if (!cJSON_IsString(it))
          return field_error(c, k->key, "every entry must be a path (string), got %s", type_name(it));
      return RC_OK;
    }
    case CLI_OPT_INT:
    case CLI_OPT_NUM: return check_number(c, k, v);
    case CLI_OPT_CHOICE:
      if (!cJSON_IsString(v)) return field_error(c, k->key, "expected a string, got %s", type_name(v));
      for (const char *const *s = k->o->choices; *s; s++)
        if (!strcmp(*s, v->valuestring)) return RC_OK;
      return field_error(c, k->key, "unknown value '%s'", v->valuestring);
    case CLI_OPT_NUMLIST: {
      if (cJSON_IsNumber(v)) return check_number(c, k, v);
      if (!cJSON_IsArray(v)) return field_error(c, k->key, "expected a number or an array of numbers, got %s",
                                                type_name(v));
      int n = cJSON_GetArraySize(v);
      if (n == 0 || n > CLI_MAX_CHANNELS) return field_error(c, k->key, "expected 1 to %d numbers", CLI_MAX_CHANNELS);
      const cJSON *it;
      cJSON_ArrayForEach(it, v) {
        if (!cJSON_IsNumber(it) || !isfinite(it->valuedouble))
          return field_error(c, k->key, "every entry must be a finite number, got %s", type_name(it));
        if (!strcmp(k->key, "std") && it->valuedouble == 0) return field_error(c, k->key, "zero standard deviation");
      }
      return RC_OK;
    }
    case CLI_OPT_STRLIST: {
      if (cJSON_IsString(v)) return RC_OK;
      if (!cJSON_IsArray(v)) return field_error(c, k->key, "expected a string or an array of strings, got %s",
                                                type_name(v));
      if (cJSON_GetArraySize(v) > MAX_LIST) return field_error(c, k->key, "more than %d patterns", MAX_LIST);
      const cJSON *it;
      cJSON_ArrayForEach(it, v) if (!cJSON_IsString(it))
          return field_error(c, k->key, "every entry must be a string, got %s", type_name(it));
      return RC_OK;
    }
    case CLI_OPT_FLAG:
      if (!cJSON_IsBool(v)) return field_error(c, k->key, "expected true or false, got %s", type_name(v));
      return RC_OK;
    case CLI_OPT_TERMS: {
      char text[1024];
      if (terms_text(v, text, sizeof text))
        return field_error(c, k->key, "expected a string such as \"kd=1,hint=0.5\" or an object of term to weight "
                           "(numbers), got %s", type_name(v));
      /* The same parser distill uses, so the two can never disagree. */
      rc_err pe = {0};
      if (rc_distill_loss_check(text, &pe) != RC_OK) return field_error(c, k->key, "%s", pe.msg);
      return RC_OK;
    }
  }
  return RC_OK;
}

static rc_status check_object(ctx *c, const cJSON *obj, int is_job) {
  const cJSON *it;
  cJSON_ArrayForEach(it, obj) {
    key_def k;
    int is_name = !strcmp(it->string, "name"); /* the job's own, not an option */
    if (!is_name && !find_key(it->string, &k)) {
      const char *hint = strchr(it->string, '-') ? " (write '-' as '_')" : "";
      return field_error(c, it->string, "unknown key%s", hint);
    }
    cli_opt_where w = is_name ? CLI_OPT_JOB_ONLY : k.o->where;
    if (w == CLI_OPT_BATCH_OWNED) return field_error(c, it->string, "set by recoup batch itself, not by the manifest");
    if (w == CLI_OPT_JOB_ONLY && !is_job) return field_error(c, it->string, "belongs in each job, not in \"defaults\"");
    for (const cJSON *o = obj->child; o != it; o = o->next)
      if (!strcmp(o->string, it->string)) return field_error(c, it->string, "given twice");
    if (is_name && !cJSON_IsString(it)) return field_error(c, it->string, "expected a string, got %s", type_name(it));
    if (!is_name) RC_TRY(check_value(c, &k, it));
  }
  return RC_OK;
}

/* ---- Building one job --------------------------------------------------------------- */

static const cJSON *value_of(const cJSON *job, const cJSON *defaults, const char *key) {
  const cJSON *v = cJSON_GetObjectItemCaseSensitive(job, key);
  return v ? v : defaults ? cJSON_GetObjectItemCaseSensitive(defaults, key) : NULL;
}

static rc_status add_input(ctx *c, strlist *args, strlist *ins, const char *opt, const char *field,
                           const char *prefix, const char *given) {
  char resolved[PATH_MAX], arg[PATH_MAX + 256];
  RC_TRY(resolve_path(c, field, given, 1, resolved));
  RC_TRY(push(ins, resolved, c->e));
  snprintf(arg, sizeof arg, "%s%s%s", prefix ? prefix : "", prefix ? "=" : "", resolved);
  RC_TRY(push(args, opt, c->e));
  return push(args, arg, c->e);
}

static rc_status add_option(ctx *c, cli_job *j, const key_def *k, const cJSON *v, strlist *args, strlist *ins) {
  char opt[64], buf[64 * 32];
  snprintf(opt, sizeof opt, "--%s", k->o->name);
  switch (k->o->kind) {
    case CLI_OPT_PATH:
      if (!strcmp(k->key, "out")) {
        char resolved[PATH_MAX];
        RC_TRY(resolve_path(c, "out", v->valuestring, 0, resolved));
        if (!(j->out = strdup(resolved)) || !(j->out_given = strdup(v->valuestring)))
          return rc_err_set(c->e, RC_ERR_NOMEM, "out of memory");
        RC_TRY(push(args, opt, c->e));
        return push(args, resolved, c->e);
      }
      if (!strcmp(k->key, "teacher") && !(j->teacher_given = strdup(v->valuestring)))
        return rc_err_set(c->e, RC_ERR_NOMEM, "out of memory");
      if (!strcmp(k->key, "student") && !(j->student_given = strdup(v->valuestring)))
        return rc_err_set(c->e, RC_ERR_NOMEM, "out of memory");
      return add_input(c, args, ins, opt, k->key, NULL, v->valuestring);
    case CLI_OPT_DATA: {
      if (cJSON_IsString(v)) return add_input(c, args, ins, opt, k->key, NULL, v->valuestring);
      const cJSON *it;
      cJSON_ArrayForEach(it, v)
          RC_TRY(add_input(c, args, ins, opt, k->key, cJSON_IsObject(v) ? it->string : NULL, it->valuestring));
      return RC_OK;
    }
    case CLI_OPT_INT:
    case CLI_OPT_NUM: snprintf(buf, sizeof buf, "%.17g", v->valuedouble); break;
    case CLI_OPT_CHOICE: snprintf(buf, sizeof buf, "%s", v->valuestring); break;
    case CLI_OPT_NUMLIST: {
      if (cJSON_IsNumber(v)) {
        snprintf(buf, sizeof buf, "%.9g", v->valuedouble);
        break;
      }
      size_t o = 0;
      const cJSON *it;
      cJSON_ArrayForEach(it, v) o += (size_t)snprintf(buf + o, sizeof buf - o, "%s%.9g", o ? "," : "", it->valuedouble);
      break;
    }
    case CLI_OPT_STRLIST: {
      if (cJSON_IsString(v)) {
        RC_TRY(push(args, opt, c->e));
        return push(args, v->valuestring, c->e);
      }
      const cJSON *it;
      cJSON_ArrayForEach(it, v) {
        RC_TRY(push(args, opt, c->e));
        RC_TRY(push(args, it->valuestring, c->e));
      }
      return RC_OK;
    }
    case CLI_OPT_FLAG: return cJSON_IsTrue(v) ? push(args, opt, c->e) : RC_OK;
    case CLI_OPT_TERMS: terms_text(v, buf, sizeof buf); break;
  }
  RC_TRY(push(args, opt, c->e));
  return push(args, buf, c->e);
}

static int valid_name(const char *s) {
  size_t n = strlen(s);
  if (n == 0 || n > MAX_NAME || s[0] == '.' || s[0] == '-') return 0;
  for (const char *p = s; *p; p++)
    if (!((*p >= 'a' && *p <= 'z') || (*p >= 'A' && *p <= 'Z') || (*p >= '0' && *p <= '9') || *p == '_' ||
          *p == '-' || *p == '.'))
      return 0;
  return 1;
}

static rc_status build_job(ctx *c, cli_job *j, int index, const cJSON *job, const cJSON *defaults) {
  j->index = index;
  snprintf(c->where, sizeof c->where, "jobs[%d]", index);
  if (!cJSON_IsObject(job)) return field_error(c, NULL, "expected an object, got %s", type_name(job));
  const cJSON *name = cJSON_GetObjectItemCaseSensitive(job, "name");
  if (!name) return field_error(c, "name", "missing");
  if (!cJSON_IsString(name)) return field_error(c, "name", "expected a string, got %s", type_name(name));
  if (!valid_name(name->valuestring))
    return field_error(c, "name", "'%.100s' is not a usable name (1 to %d letters, digits, '_', '-' or '.', "
                       "not starting with '.' or '-'; it names log and report files)", name->valuestring, MAX_NAME);
  snprintf(c->where, sizeof c->where, "job '%s' (jobs[%d])", name->valuestring, index);
  if (!(j->name = strdup(name->valuestring))) return rc_err_set(c->e, RC_ERR_NOMEM, "out of memory");
  RC_TRY(check_object(c, job, 1));
  static const char *const required[] = {"teacher", "student", "data", "out"};
  for (int i = 0; i < 4; i++)
    if (!value_of(job, defaults, required[i])) return field_error(c, required[i], "missing");
  if (value_of(job, defaults, "val_labels") && !value_of(job, defaults, "val_data"))
    return field_error(c, "val_labels", "needs 'val_data'");
  strlist args = {0}, ins = {0};
  rc_status s = RC_OK;
  char job_where[sizeof c->where];
  memcpy(job_where, c->where, sizeof job_where);
  for (int i = 0; i < CLI_DISTILL_N_OPTIONS && s == RC_OK; i++) {
    key_def k;
    key_of(&cli_distill_options[i], &k);
    if (k.o->where == CLI_OPT_BATCH_OWNED) continue;
    const cJSON *v = value_of(job, defaults, k.key);
    /* A default's error names "defaults" and the job that used it. */
    if (v && !cJSON_GetObjectItemCaseSensitive(job, k.key))
      snprintf(c->where, sizeof c->where, "defaults (as used by job '%s')", j->name);
    if (v) s = add_option(c, j, &k, v, &args, &ins);
    if (s == RC_OK) memcpy(c->where, job_where, sizeof job_where);
  }
  j->args = args.v, j->n_args = args.n;
  j->inputs = ins.v, j->n_inputs = ins.n;
  return s;
}

/* ---- Whole-manifest checks ------------------------------------------------------------ */

static rc_status check_across_jobs(ctx *c, const cli_manifest *m) {
  for (int i = 0; i < m->n_jobs; i++) {
    const cli_job *a = &m->jobs[i];
    snprintf(c->where, sizeof c->where, "job '%s' (jobs[%d])", a->name, i);
    for (int k = 0; k < i; k++) {
      if (!strcmp(a->name, m->jobs[k].name))
        return field_error(c, "name", "'%s' is also the name of jobs[%d]", a->name, k);
      if (rc_path_same_file(a->out, m->jobs[k].out))
        return field_error(c, "out", "'%s' is also the output of job '%s'", a->out_given, m->jobs[k].name);
    }
    /* The job writes its output, OUT.ckpt, OUT.ckpt.1 and (without a report
     * folder) OUT.log; none may be a file any job reads, nor the manifest. */
    static const char *const suffix[] = {"", ".ckpt", ".ckpt.1", ".log"};
    char w[PATH_MAX + 16];
    for (size_t s = 0; s < sizeof suffix / sizeof suffix[0]; s++) {
      snprintf(w, sizeof w, "%s%s", a->out, suffix[s]);
      if (rc_path_same_file(w, m->path))
        return field_error(c, "out", "'%s%s' is the manifest itself", a->out_given, suffix[s]);
      for (int k = 0; k < m->n_jobs; k++)
        for (int f = 0; f < m->jobs[k].n_inputs; f++)
          if (rc_path_same_file(w, m->jobs[k].inputs[f])) {
            if (k == i) return field_error(c, "out", "'%s%s' is one of this job's inputs", a->out_given, suffix[s]);
            return field_error(c, "out", "'%s%s' is an input of job '%s'", a->out_given, suffix[s], m->jobs[k].name);
          }
    }
  }
  return RC_OK;
}

static rc_status read_file(const char *path, char **text, size_t *len, rc_err *e) {
  FILE *f = fopen(path, "rb");
  if (!f) return rc_err_set(e, RC_ERR_IO, "manifest %s: %s", path, strerror(errno));
  struct stat st;
  if (fstat(fileno(f), &st) != 0 || !S_ISREG(st.st_mode)) {
    fclose(f);
    return rc_err_set(e, RC_ERR_IO, "manifest %s: not a regular file", path);
  }
  if (st.st_size > MANIFEST_MAX_BYTES) {
    fclose(f);
    return rc_err_set(e, RC_ERR_LIMIT, "manifest %s: larger than %d MiB", path, MANIFEST_MAX_BYTES >> 20);
  }
  char *buf = malloc((size_t)st.st_size + 1);
  if (!buf) {
    fclose(f);
    return rc_err_set(e, RC_ERR_NOMEM, "manifest %s: out of memory", path);
  }
  size_t n = fread(buf, 1, (size_t)st.st_size, f);
  int bad = ferror(f);
  fclose(f);
  if (bad || n != (size_t)st.st_size) {
    free(buf);
    return rc_err_set(e, RC_ERR_IO, "manifest %s: read error", path);
  }
  buf[n] = '\0';
  *text = buf;
  *len = n;
  return RC_OK;
}

static rc_status parse_error(const char *path, const char *text, rc_err *e) {
  const char *at = cJSON_GetErrorPtr();
  int line = 1;
  if (at)
    for (const char *p = text; p < at && *p; p++) line += *p == '\n';
  return rc_err_set(e, RC_ERR_FORMAT, "manifest %s: not valid JSON (near line %d)", path, line);
}

static rc_status load_jobs(cli_manifest *m, ctx *c, const cJSON *root) {
  if (!cJSON_IsObject(root)) return field_error(c, NULL, "expected a JSON object with \"jobs\"");
  const cJSON *it;
  cJSON_ArrayForEach(it, root) if (strcmp(it->string, "defaults") && strcmp(it->string, "jobs") &&
                                   strcmp(it->string, "title")) return field_error(c, it->string,
                                                                                   "unknown key (expected "
                                                                                   "\"title\", \"defaults\", "
                                                                                   "\"jobs\")");
  const cJSON *title = cJSON_GetObjectItemCaseSensitive(root, "title");
  if (title && !cJSON_IsString(title)) return field_error(c, "title", "expected a string, got %s", type_name(title));
  if (title && !(m->title = strdup(title->valuestring))) return rc_err_set(c->e, RC_ERR_NOMEM, "out of memory");
  const cJSON *defaults = cJSON_GetObjectItemCaseSensitive(root, "defaults");
  snprintf(c->where, sizeof c->where, "defaults");
  if (defaults) {
    if (!cJSON_IsObject(defaults)) return field_error(c, NULL, "expected an object, got %s", type_name(defaults));
    RC_TRY(check_object(c, defaults, 0));
  }
  const cJSON *jobs = cJSON_GetObjectItemCaseSensitive(root, "jobs");
  snprintf(c->where, sizeof c->where, "top level");
  if (!jobs) return field_error(c, "jobs", "missing");
  if (!cJSON_IsArray(jobs)) return field_error(c, "jobs", "expected an array, got %s", type_name(jobs));
  int n = cJSON_GetArraySize(jobs);
  if (n == 0) return field_error(c, "jobs", "no jobs");
  if (n > MAX_JOBS) return field_error(c, "jobs", "more than %d jobs", MAX_JOBS);
  if (!(m->jobs = calloc((size_t)n, sizeof *m->jobs))) return rc_err_set(c->e, RC_ERR_NOMEM, "out of memory");
  int i = 0;
  cJSON_ArrayForEach(it, jobs) {
    m->n_jobs = i + 1;
    RC_TRY(build_job(c, &m->jobs[i], i, it, defaults));
    i++;
  }
  return check_across_jobs(c, m);
}

rc_status cli_manifest_load(cli_manifest *m, const char *path, int allow_outside, rc_err *e) {
  memset(m, 0, sizeof *m);
  char *text = NULL;
  size_t len = 0;
  RC_TRY(read_file(path, &text, &len, e));
  cli_sha256 h;
  cli_sha256_init(&h);
  cli_sha256_update(&h, text, len);
  cli_sha256_hex(&h, m->sha256);
  char real[PATH_MAX];
  if (!realpath(path, real)) {
    free(text);
    return rc_err_set(e, RC_ERR_IO, "manifest %s: %s", path, strerror(errno));
  }
  char *slash = strrchr(real, '/');
  if (slash == real) slash[1] = '\0';
  else *slash = '\0';
  m->path = strdup(path);
  m->dir = strdup(real);
  cJSON *root = cJSON_ParseWithLength(text, len);
  rc_status s;
  if (!m->path || !m->dir) s = rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  else if (!root) s = parse_error(path, text, e);
  else {
    ctx c = {path, "", m->dir, allow_outside, e};
    s = load_jobs(m, &c, root);
  }
  cJSON_Delete(root);
  free(text);
  if (s != RC_OK) cli_manifest_free(m);
  return s;
}

void cli_manifest_free(cli_manifest *m) {
  for (int i = 0; i < m->n_jobs; i++) {
    cli_job *j = &m->jobs[i];
    free(j->name);
    free(j->out);
    free(j->out_given);
    free(j->teacher_given);
    free(j->student_given);
    strlist_free(j->args, j->n_args);
    strlist_free(j->inputs, j->n_inputs);
  }
  free(m->jobs);
  free(m->path);
  free(m->dir);
  free(m->title);
  memset(m, 0, sizeof *m);
}
