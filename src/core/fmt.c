#include "core/fmt.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

char *rc__fmt_sig(char *buf, size_t n, double v, int sig, int plus) {
  if (!buf || n == 0) return buf;
  const char *sign = v < 0 ? "-" : plus && v > 0 ? "+" : "";
  if (isnan(v)) {
    snprintf(buf, n, "nan");
    return buf;
  }
  if (isinf(v)) {
    snprintf(buf, n, "%sinf", sign);
    return buf;
  }
  if (v == 0) {
    snprintf(buf, n, "0");
    return buf;
  }
  sig = sig < 1 ? 1 : sig > 15 ? 15 : sig;
  double a = fabs(v);
  /* The exponent after rounding to `sig` digits (9.9996 at 4 digits is 10.00). */
  char sci[64];
  snprintf(sci, sizeof sci, "%.*e", sig - 1, a);
  const char *ep = strchr(sci, 'e');
  int exp10 = ep ? atoi(ep + 1) : 0;
  if (exp10 < -3 || exp10 >= 6) {
    /* C writes at least two exponent digits ("e-07"); one is enough. */
    snprintf(buf, n, "%s%.*se%d", sign, ep ? (int)(ep - sci) : (int)strlen(sci), sci, exp10);
    return buf;
  }
  int decimals = sig - 1 - exp10;
  snprintf(buf, n, "%s%.*f", sign, decimals > 0 ? decimals : 0, a);
  return buf;
}
