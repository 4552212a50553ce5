/* Image sets: a folder read recursively or a list file, labels from the
 * first level of subfolders or from the list, and loading every image into
 * one (N, C, H, W) uint8 array with a pool of OpenMP workers. Each image
 * writes only its own slot, so the result is the same for any thread count. */
#define _POSIX_C_SOURCE 200809L

#include <dirent.h>
#include <errno.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>

#include <omp.h>

#include "core/alloc.h"
#include "core/file.h"
#include "core/status.h"
#include "data/data_internal.h"
#include "recoup/image.h"

#define MAX_DEPTH 32
#define MAX_PATH_LEN 4096

static int is_image_name(const char *name) {
  return rc__ends_with_ci(name, ".jpg") || rc__ends_with_ci(name, ".jpeg") || rc__ends_with_ci(name, ".png");
}

int rc_image_set_is_source(const char *path) {
  struct stat st;
  if (stat(path, &st) == 0 && S_ISDIR(st.st_mode)) return 1;
  return rc__ends_with_ci(path, ".txt") || rc__ends_with_ci(path, ".lst") || rc__ends_with_ci(path, ".list");
}

/* A growing list of strings and labels. */
typedef struct grow {
  char **s;
  int32_t *lab;
  int64_t n, cap;
} grow;

static rc_status grow_push(grow *g, const char *s, int32_t label, rc_err *e) {
  if (g->n == g->cap) {
    int64_t cap = g->cap ? g->cap * 2 : 64;
    char **ns = rc__realloc(g->s, sizeof(char *) * (size_t)cap);
    if (!ns) return rc__fail(e, RC_ERR_NOMEM, "out of memory listing images");
    g->s = ns;
    int32_t *nl = rc__realloc(g->lab, sizeof(int32_t) * (size_t)cap);
    if (!nl) return rc__fail(e, RC_ERR_NOMEM, "out of memory listing images");
    g->lab = nl;
    g->cap = cap;
  }
  g->s[g->n] = rc__strdup(s);
  if (!g->s[g->n]) return rc__fail(e, RC_ERR_NOMEM, "out of memory listing images");
  g->lab[g->n++] = label;
  return RC_OK;
}

static void grow_free(grow *g) {
  for (int64_t i = 0; i < g->n; i++) rc__free(g->s[i]);
  rc__free(g->s);
  rc__free(g->lab);
  memset(g, 0, sizeof *g);
}

static int by_string(const void *a, const void *b) { return strcmp(*(char *const *)a, *(char *const *)b); }

/* Entry names of one folder, sorted by bytes; hidden entries are left out. */
static rc_status folder_entries(grow *out, const char *dir, rc_err *e) {
  DIR *d = opendir(dir);
  if (!d) return rc__fail(e, RC_ERR_IO, "%s: cannot open folder: %s", dir, strerror(errno));
  struct dirent *ent;
  rc_status st = RC_OK;
  while (st == RC_OK && (ent = readdir(d)))
    if (ent->d_name[0] != '.') st = grow_push(out, ent->d_name, 0, e);
  closedir(d);
  if (st == RC_OK && out->n > 1) qsort(out->s, (size_t)out->n, sizeof(char *), by_string);
  return st;
}

/* Image files under root/rel, recursively, as paths relative to root. */
static rc_status walk(grow *out, const char *root, const char *rel, int32_t label, int depth, rc_err *e) {
  if (depth > MAX_DEPTH) return rc__fail(e, RC_ERR_LIMIT, "%s/%s: folders nested deeper than %d", root, rel, MAX_DEPTH);
  char dir[MAX_PATH_LEN];
  if (snprintf(dir, sizeof dir, "%s%s%s", root, *rel ? "/" : "", rel) >= (int)sizeof dir)
    return rc__fail(e, RC_ERR_LIMIT, "%s: path too long", root);
  grow names = {0};
  rc_status st = folder_entries(&names, dir, e);
  for (int64_t i = 0; st == RC_OK && i < names.n; i++) {
    char sub[MAX_PATH_LEN], full[MAX_PATH_LEN];
    if (snprintf(sub, sizeof sub, "%s%s%s", rel, *rel ? "/" : "", names.s[i]) >= (int)sizeof sub ||
        snprintf(full, sizeof full, "%s/%s", root, sub) >= (int)sizeof full) {
      st = rc__fail(e, RC_ERR_LIMIT, "%s: path too long", dir);
      break;
    }
    struct stat sb;
    if (stat(full, &sb) != 0) continue; /* a dangling link */
    if (S_ISDIR(sb.st_mode))
      st = walk(out, root, sub, label, depth + 1, e);
    else if (S_ISREG(sb.st_mode) && is_image_name(names.s[i]))
      st = grow_push(out, sub, label, e);
  }
  grow_free(&names);
  return st;
}

static rc_status open_folder(rc_image_set *s, const char *path, rc_image_labels labels, rc_err *e) {
  grow found = {0};
  rc_status st = RC_OK;
  if (labels == RC_IMAGE_LABELS_FOLDERS) {
    grow all = {0}, classes = {0};
    st = folder_entries(&all, path, e);
    for (int64_t i = 0; st == RC_OK && i < all.n; i++) {
      char full[MAX_PATH_LEN];
      struct stat sb;
      snprintf(full, sizeof full, "%s/%s", path, all.s[i]);
      if (stat(full, &sb) == 0 && S_ISDIR(sb.st_mode)) st = grow_push(&classes, all.s[i], 0, e);
    }
    grow_free(&all);
    if (st == RC_OK && classes.n == 0)
      st = rc__fail(e, RC_ERR_INVALID, "%s: labels from folders need one subfolder per class, found none", path);
    if (st == RC_OK && classes.n > INT32_MAX / 2) st = rc__fail(e, RC_ERR_LIMIT, "%s: too many classes", path);
    for (int64_t k = 0; st == RC_OK && k < classes.n; k++) {
      int64_t before = found.n;
      st = walk(&found, path, classes.s[k], (int32_t)k, 1, e);
      (void)before;
    }
    if (st == RC_OK) {
      s->classes = classes.s;
      s->n_classes = (int)classes.n;
      classes.s = NULL;
      rc__free(classes.lab);
    } else {
      grow_free(&classes);
    }
  } else {
    st = walk(&found, path, "", -1, 0, e);
  }
  if (st == RC_OK && found.n == 0)
    st = rc__fail(e, RC_ERR_INVALID, "%s: no .jpg, .jpeg or .png files in the folder", path);
  if (st != RC_OK) {
    grow_free(&found);
    return st;
  }
  s->paths = found.s;
  s->n = found.n;
  if (labels == RC_IMAGE_LABELS_FOLDERS)
    s->labels = found.lab;
  else
    rc__free(found.lab);
  return RC_OK;
}

/* One line of a list file: "path" or "path label" (whitespace between). */
static rc_status parse_line(grow *out, char *line, int64_t lineno, const char *list, int want_labels, rc_err *e) {
  size_t len = strlen(line);
  while (len && (line[len - 1] == '\n' || line[len - 1] == '\r' || line[len - 1] == ' ' || line[len - 1] == '\t'))
    line[--len] = '\0';
  while (*line == ' ' || *line == '\t') line++;
  if (!*line || *line == '#') return RC_OK;
  char *sep = line + strlen(line);
  while (sep > line && sep[-1] != ' ' && sep[-1] != '\t') sep--;
  int32_t label = -1;
  if (sep > line) {
    char *end;
    errno = 0;
    long v = strtol(sep, &end, 10);
    if (*end || errno || v < 0 || v > INT32_MAX) {
      if (want_labels)
        return rc__fail(e, RC_ERR_FORMAT, "%s:%lld: '%s' is not a label (a whole number from 0)", list,
                        (long long)lineno, sep);
    } else {
      label = (int32_t)v;
      char *p = sep;
      while (p > line && (p[-1] == ' ' || p[-1] == '\t')) p--;
      *p = '\0';
    }
  }
  if (want_labels && label < 0)
    return rc__fail(e, RC_ERR_FORMAT, "%s:%lld: no label after the path (labels from the list)", list,
                    (long long)lineno);
  return grow_push(out, line, label, e);
}

static rc_status open_list(rc_image_set *s, const char *path, rc_image_labels labels, rc_err *e) {
  FILE *f = fopen(path, "r");
  if (!f) return rc__fail(e, RC_ERR_IO, "%s: cannot open: %s", path, strerror(errno));
  grow found = {0};
  rc_status st = RC_OK;
  char line[MAX_PATH_LEN + 64];
  int64_t lineno = 0;
  while (st == RC_OK && fgets(line, sizeof line, f)) {
    lineno++;
    if (!strchr(line, '\n') && !feof(f))
      st = rc__fail(e, RC_ERR_LIMIT, "%s:%lld: line longer than %d characters", path, (long long)lineno, MAX_PATH_LEN);
    else
      st = parse_line(&found, line, lineno, path, labels == RC_IMAGE_LABELS_LIST, e);
  }
  if (st == RC_OK && ferror(f)) st = rc__fail(e, RC_ERR_IO, "%s: read error", path);
  fclose(f);
  if (st == RC_OK && found.n == 0) st = rc__fail(e, RC_ERR_INVALID, "%s: lists no images", path);
  if (st != RC_OK) {
    grow_free(&found);
    return st;
  }
  s->paths = found.s;
  s->n = found.n;
  if (labels == RC_IMAGE_LABELS_LIST)
    s->labels = found.lab;
  else
    rc__free(found.lab);
  s->is_list = 1;
  return RC_OK;
}

rc_status rc_image_set_open(rc_image_set *s, const char *path, rc_image_labels labels, rc_err *e) {
  memset(s, 0, sizeof *s);
  struct stat sb;
  if (stat(path, &sb) != 0) return rc__fail(e, RC_ERR_IO, "%s: %s", path, strerror(errno));
  int folder = S_ISDIR(sb.st_mode);
  if (labels == RC_IMAGE_LABELS_FOLDERS && !folder)
    return rc__fail(e, RC_ERR_INVALID, "%s: labels from folders need a folder of images", path);
  if (labels == RC_IMAGE_LABELS_LIST && folder)
    return rc__fail(e, RC_ERR_INVALID, "%s: labels from a list need a list file", path);
  if (folder) {
    s->root = rc__strdup(path);
  } else {
    s->root = rc__path_dir(path);
  }
  if (!s->root) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  rc_status st = folder ? open_folder(s, path, labels, e) : open_list(s, path, labels, e);
  if (st != RC_OK) rc_image_set_free(s);
  return st;
}

void rc_image_set_free(rc_image_set *s) {
  for (int64_t i = 0; i < s->n; i++) rc__free(s->paths[i]);
  rc__free(s->paths);
  rc__free(s->labels);
  for (int k = 0; k < s->n_classes; k++) rc__free(s->classes[k]);
  rc__free(s->classes);
  rc__free(s->root);
  memset(s, 0, sizeof *s);
}

const char *rc_image_set_path(const rc_image_set *s, int64_t i, char *buf, size_t n) {
  const char *p = s->paths[i];
  if (p[0] == '/')
    snprintf(buf, n, "%s", p);
  else
    snprintf(buf, n, "%s/%s", s->root, p);
  return buf;
}

rc_status rc__image_read_one(uint8_t *dst, const rc_image_set *s, int64_t i, const rc_image_prep *p, rc_err *e) {
  char path[MAX_PATH_LEN * 2];
  rc_image_set_path(s, i, path, sizeof path);
  uint8_t *buf = NULL;
  size_t n = 0;
  RC_TRY(rc__file_read_all(path, (size_t)1 << 30, &buf, &n, e));
  rc_image im;
  rc_status st = rc_image_decode(&im, buf, n, path, 0, e);
  rc__free(buf);
  if (st != RC_OK) return st;
  st = rc_image_prepare(dst, &im, p, e);
  rc_image_free(&im);
  if (st != RC_OK && strncmp(e->msg, path, strlen(path)) != 0) rc__wrap(e, "%s", path);
  return st;
}

void rc_image_load_free(rc_image_load *l) {
  rc_array_free(&l->images);
  rc_array_free(&l->labels);
  for (int64_t i = 0; i < l->n_skipped; i++) rc__free(l->skipped_why[i]);
  rc__free(l->skipped_why);
  rc__free(l->skipped);
  memset(l, 0, sizeof *l);
}

rc_status rc__image_prep_check(const rc_image_prep *p, rc_err *e) {
  if (p->channels != 1 && p->channels != 3)
    return rc__fail(e, RC_ERR_INVALID, "images feed inputs of 1 or 3 channels, this one has %d", p->channels);
  if (p->height <= 0 || p->width <= 0)
    return rc__fail(e, RC_ERR_INVALID, "no crop size for the images (the model's input height and width)");
  return RC_OK;
}

rc_status rc_image_set_load(rc_image_load *out, const rc_image_set *s, const rc_image_prep *p, int skip_bad,
                            int threads, rc_err *e) {
  memset(out, 0, sizeof *out);
  RC_TRY(rc__image_prep_check(p, e));
  size_t per = 0, total = 0;
  if (!rc__mul_size((size_t)p->channels * (size_t)p->height, (size_t)p->width, &per) ||
      !rc__mul_size(per, (size_t)s->n, &total))
    return rc__fail(e, RC_ERR_LIMIT, "%lld images of %zu bytes overflow", (long long)s->n, per);
  uint8_t *px = rc__malloc(total ? total : 1);
  rc_status *sts = rc__calloc((size_t)s->n, sizeof(rc_status));
  char **why = rc__calloc((size_t)s->n, sizeof(char *));
  if (!px || !sts || !why) {
    rc__free(px);
    rc__free(sts);
    rc__free(why);
    return rc__fail(e, RC_ERR_NOMEM, "out of memory for %lld images (%zu bytes)", (long long)s->n, total);
  }
  int nt = threads > 0 ? threads : 0;
#pragma omp parallel for schedule(dynamic, 8) num_threads(nt > 0 ? nt : omp_get_max_threads())
  for (int64_t i = 0; i < s->n; i++) {
    rc_err ie = {0};
    sts[i] = rc__image_read_one(px + (size_t)i * per, s, i, p, &ie);
    if (sts[i] != RC_OK) why[i] = rc__strdup(ie.msg);
  }
  rc_status st = RC_OK;
  int64_t kept = 0, bad = 0;
  for (int64_t i = 0; i < s->n; i++) bad += sts[i] != RC_OK;
  if (bad && !skip_bad) {
    for (int64_t i = 0; i < s->n && st == RC_OK; i++)
      if (sts[i] != RC_OK) st = rc__fail(e, sts[i], "%s", why[i] ? why[i] : "out of memory");
  } else if (bad == s->n) {
    st = rc__fail(e, RC_ERR_INVALID, "none of the %lld images could be read (first: %s)", (long long)s->n,
                  why[0] ? why[0] : "?");
  }
  if (st == RC_OK && bad) {
    out->skipped = rc__malloc(sizeof(int64_t) * (size_t)bad);
    out->skipped_why = rc__calloc((size_t)bad, sizeof(char *));
    if (!out->skipped || !out->skipped_why) st = rc__fail(e, RC_ERR_NOMEM, "out of memory");
  }
  if (st == RC_OK && s->labels) {
    out->labels.owned = rc__malloc(sizeof(int32_t) * (size_t)(s->n - bad));
    if (!out->labels.owned) st = rc__fail(e, RC_ERR_NOMEM, "out of memory");
  }
  for (int64_t i = 0; st == RC_OK && i < s->n; i++) {
    if (sts[i] != RC_OK) {
      out->skipped[out->n_skipped] = i;
      out->skipped_why[out->n_skipped++] = why[i];
      why[i] = NULL;
      continue;
    }
    if (kept != i) memmove(px + (size_t)kept * per, px + (size_t)i * per, per);
    if (s->labels) ((int32_t *)out->labels.owned)[kept] = s->labels[i];
    kept++;
  }
  for (int64_t i = 0; i < s->n; i++) rc__free(why[i]);
  rc__free(why);
  rc__free(sts);
  if (st != RC_OK) {
    rc__free(px);
    rc_image_load_free(out);
    return st;
  }
  out->images.owned = px;
  out->images.t = (rc_tensor){RC_DTYPE_UINT8, 4, {kept, p->channels, p->height, p->width}, px};
  if (s->labels) out->labels.t = (rc_tensor){RC_DTYPE_INT32, 1, {kept}, out->labels.owned};
  return RC_OK;
}
