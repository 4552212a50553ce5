/* recoup/util.h: the public names of the core helpers. */
#include "core/escape.h"
#include "core/file.h"
#include "core/fmt.h"
#include "core/path.h"
#include "recoup/util.h"

char *rc_text_escape(char *dst, size_t n, const char *src) { return rc__escape(dst, n, src); }

int rc_text_needs_escape(const char *s) { return rc__needs_escape(s); }

int rc_path_same_file(const char *out, const char *in) { return rc__path_same_file(out, in); }

rc_status rc_path_refuse_inputs(const char *out_label, const char *out, const char *const *inputs,
                                const char *const *in_labels, int n, rc_err *e) {
  return rc__path_refuse_inputs(out_label, out, inputs, in_labels, n, e);
}

rc_status rc_file_write_atomic(const char *path, const void *data, size_t n, rc_err *e) {
  return rc__write_atomic(path, data, n, e);
}

char *rc_fmt_sig(char *buf, size_t n, double v, int sig, int plus) { return rc__fmt_sig(buf, n, v, sig, plus); }
