/* How a model's inputs are prepared, remembered in the model itself: the
 * files distill and quantize write carry the scale, mean, std and image
 * resize they were trained or calibrated with in metadata_props, under keys
 * of our own, so eval, distill and quantize need not be told again. */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "cli/cli.h"
#include "cli/cli_data.h"
#include "recoup/model.h"

#define KEY_SCALE "recoup.input.scale"
#define KEY_MEAN "recoup.input.mean"
#define KEY_STD "recoup.input.std"
#define KEY_RESIZE "recoup.input.resize"

/* "0.5,0.25" with enough digits that parsing gives the same floats back. */
static void floats_text(char *buf, size_t n, const float *v, int count) {
  size_t o = 0;
  buf[0] = '\0';
  for (int i = 0; i < count && o + 20 < n; i++) o += (size_t)snprintf(buf + o, n - o, "%s%.9g", i ? "," : "", v[i]);
}

static int same_floats(const float *a, int na, const float *b, int nb) {
  if (na != nb) return 0;
  for (int i = 0; i < na; i++)
    if (a[i] != b[i]) return 0;
  return 1;
}

static void add_text(char *buf, size_t n, const char *fmt, const char *name, const char *value) {
  size_t o = strlen(buf);
  if (o + 1 < n) snprintf(buf + o, n - o, fmt, name, value);
}

/* One recorded float list into rec; a given list that differs is noted. */
static rc_status read_floats(const rc_model *m, const char *key, const char *name, float *rec, int *nrec,
                             const float *v, int n, int given, char *text, char *differs, size_t cap, rc_err *e) {
  const char *t = rc_model_metadata(m, key);
  if (!t) return RC_OK;
  if (*t && rc_data_parse_floats(t, rec, CLI_MAX_CHANNELS, nrec, e) != RC_OK)
    return rc_err_prefix(e, "%s: metadata '%s'", rc_model_path(m), key);
  if (*nrec) add_text(text, cap, " --%s %s", name, t);
  if (given && !same_floats(v, n, rec, *nrec)) add_text(differs, cap, " --%s %s", name, *t ? t : "(none)");
  return RC_OK;
}

rc_status cli_prep_apply(cli_data_opts *o, const rc_model *m, rc_err *e) {
  const char *scale = rc_model_metadata(m, KEY_SCALE);
  if (!scale) return RC_OK;
  char differs[512] = "";
  float s = 0;
  int ns = 0;
  if (rc_data_parse_floats(scale, &s, 1, &ns, e) != RC_OK || ns != 1 || s == 0)
    return rc_err_set(e, RC_ERR_FORMAT, "%s: metadata '%s' is '%s', not one non-zero number", rc_model_path(m),
                      KEY_SCALE, scale);
  o->recorded = 1;
  o->rec_model = rc_model_path(m);
  o->rec_scale = s;
  o->rec_text[0] = '\0';
  add_text(o->rec_text, sizeof o->rec_text, " --%s %s", "scale", scale);
  if (o->given_scale && (float)o->scale != s) add_text(differs, sizeof differs, " --%s %s", "scale", scale);
  RC_TRY(read_floats(m, KEY_MEAN, "mean", o->rec_mean, &o->rec_n_mean, o->mean, o->n_mean, o->given_mean, o->rec_text,
                     differs, sizeof o->rec_text, e));
  RC_TRY(read_floats(m, KEY_STD, "std", o->rec_std, &o->rec_n_std, o->std, o->n_std, o->given_std, o->rec_text,
                     differs, sizeof o->rec_text, e));
  const char *resize = rc_model_metadata(m, KEY_RESIZE);
  if (resize) {
    long r = 0;
    if (cli_parse_int(resize, 1, 1 << 15, &r))
      return rc_err_set(e, RC_ERR_FORMAT, "%s: metadata '%s' is '%s', not a size in pixels", rc_model_path(m),
                        KEY_RESIZE, resize);
    add_text(o->rec_text, sizeof o->rec_text, " --%s %s", "resize", resize);
    if (!o->given_resize)
      o->resize = (int)r; /* only images are resized */
    else if (o->resize != r)
      add_text(differs, sizeof differs, " --%s %s", "resize", resize);
  }
  if (*differs)
    fprintf(stderr,
            "note: the command line differs from the preprocessing recorded in %s (%s ); the command line wins\n",
            rc_model_path(m), differs);
  return RC_OK;
}

void cli_prep_norm(rc_data_norm *norm, float *mean, float *std, const cli_data_opts *o, rc_dtype source,
                   const char *file) {
  int integer = source != RC_DTYPE_FLOAT && source != RC_DTYPE_DOUBLE && source != RC_DTYPE_FLOAT16 &&
                source != RC_DTYPE_BFLOAT16;
  int use = o->recorded && integer;
  int given = o->given_scale || o->given_mean || o->given_std;
  memcpy(mean, use && !o->given_mean ? o->rec_mean : o->mean, sizeof(float) * CLI_MAX_CHANNELS);
  memcpy(std, use && !o->given_std ? o->rec_std : o->std, sizeof(float) * CLI_MAX_CHANNELS);
  norm->scale = (float)(use && !o->given_scale ? o->rec_scale : o->scale);
  norm->mean = mean;
  norm->n_mean = use && !o->given_mean ? o->rec_n_mean : o->n_mean;
  norm->std = std;
  norm->n_std = use && !o->given_std ? o->rec_n_std : o->n_std;
  /* Say only what the record supplies, not what the command line gave. */
  char used[256] = "", num[CLI_MAX_CHANNELS * 20 + 16];
  if (use && !o->given_scale) {
    snprintf(num, sizeof num, "%.9g", o->rec_scale);
    add_text(used, sizeof used, " --%s %s", "scale", num);
  }
  if (use && !o->given_mean && o->rec_n_mean) {
    floats_text(num, sizeof num, o->rec_mean, o->rec_n_mean);
    add_text(used, sizeof used, " --%s %s", "mean", num);
  }
  if (use && !o->given_std && o->rec_n_std) {
    floats_text(num, sizeof num, o->rec_std, o->rec_n_std);
    add_text(used, sizeof used, " --%s %s", "std", num);
  }
  if (*used)
    fprintf(stderr, "note: %s: using the preprocessing recorded in %s:%s%s\n", file, o->rec_model, used,
            given ? " (where the command line gives none)" : "");
  else if (o->recorded && !integer && !given)
    fprintf(stderr,
            "note: %s holds %s values, taken as already prepared; the preprocessing recorded in %s (%s ) "
            "applies to integer pixels and images\n",
            file, rc_dtype_name(source), o->rec_model, o->rec_text);
}

rc_status cli_prep_record(rc_model *m, const cli_data_opts *o, rc_err *e) {
  char buf[CLI_MAX_CHANNELS * 20 + 16];
  float s = (float)o->scale; /* the options in effect: the given ones, else the recorded ones */
  if (o->recorded && !o->given_scale) s = (float)o->rec_scale;
  floats_text(buf, sizeof buf, &s, 1);
  RC_TRY(rc_model_edit_set_metadata(m, KEY_SCALE, buf, e));
  int rec_mean = o->recorded && !o->given_mean, rec_std = o->recorded && !o->given_std;
  floats_text(buf, sizeof buf, rec_mean ? o->rec_mean : o->mean, rec_mean ? o->rec_n_mean : o->n_mean);
  RC_TRY(rc_model_edit_set_metadata(m, KEY_MEAN, buf, e));
  floats_text(buf, sizeof buf, rec_std ? o->rec_std : o->std, rec_std ? o->rec_n_std : o->n_std);
  RC_TRY(rc_model_edit_set_metadata(m, KEY_STD, buf, e));
  if (o->resize) {
    snprintf(buf, sizeof buf, "%d", o->resize);
    RC_TRY(rc_model_edit_set_metadata(m, KEY_RESIZE, buf, e));
  }
  return RC_OK;
}
