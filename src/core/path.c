#define _DEFAULT_SOURCE /* realpath */
#include "core/path.h"

#include <limits.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>

/* The absolute path `p` names: realpath when it exists; otherwise its folder
 * resolved and its last component appended (a file about to be created).
 * 0 when not even the folder resolves. */
static int resolve(const char *p, char *out) {
  if (realpath(p, out)) return 1;
  const char *slash = strrchr(p, '/');
  char dir[PATH_MAX], real[PATH_MAX];
  const char *base = slash ? slash + 1 : p;
  if (!slash) strcpy(dir, ".");
  else if (slash == p) strcpy(dir, "/");
  else snprintf(dir, sizeof dir, "%.*s", (int)(slash - p), p);
  if (!*base || !realpath(dir, real)) return 0;
  int n = snprintf(out, PATH_MAX, "%s/%s", strcmp(real, "/") ? real : "", base);
  return n > 0 && n < PATH_MAX;
}

int rc__path_same_file(const char *out, const char *in) {
  if (!out || !in) return 0;
  struct stat so, si;
  if (stat(out, &so) == 0 && stat(in, &si) == 0) return so.st_dev == si.st_dev && so.st_ino == si.st_ino;
  /* One side does not exist (yet): another job's output, a checkpoint to be
   * written. Compare where each would be. */
  char a[PATH_MAX], b[PATH_MAX];
  if (resolve(out, a) && resolve(in, b)) return !strcmp(a, b);
  return !strcmp(out, in);
}

rc_status rc__path_refuse_inputs(const char *out_label, const char *out, const char *const *inputs,
                                 const char *const *in_labels, int n, rc_err *e) {
  for (int i = 0; i < n; i++) {
    if (!inputs[i] || !rc__path_same_file(out, inputs[i])) continue;
    const char *lab = in_labels && in_labels[i] ? in_labels[i] : NULL;
    return rc__fail(e, RC_ERR_INVALID, "%s%s%s is the input file %s%s%s%s: refusing to overwrite an input",
                    out_label ? out_label : "", out_label ? " " : "", out, inputs[i], lab ? " (" : "",
                    lab ? lab : "", lab ? ")" : "");
  }
  return RC_OK;
}
