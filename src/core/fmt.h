/* Figures for people: one helper every table, summary and report uses, so a
 * small value (a KL of 1e-7, a loss near zero) never prints as 0.0000 and a
 * 100-fold change stays visible. */
#ifndef RC_CORE_FMT_H
#define RC_CORE_FMT_H

#include <stddef.h>

#include "recoup/util.h"

/* v with `sig` significant digits (1..15): fixed notation when
 * 1e-3 <= |v| < 1e6 (0.5 -> "0.5000", 123456 -> "123456"), scientific
 * otherwise (1e-7 -> "1.000e-7"); 0 -> "0"; NaN -> "nan", infinities
 * "inf"/"-inf". `plus` puts "+" before positive values (for changes).
 * Returns buf, so it can sit in a printf argument list. */
char *rc__fmt_sig(char *buf, size_t n, double v, int sig, int plus);

/* RC_FMT_SIG, the digits most figures need, is in recoup/util.h. */

#endif
