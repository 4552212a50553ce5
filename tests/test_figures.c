/* The figures distill and the reports print: the one number formatter
 * (core/fmt.h) and the rule that picks the state distill keeps
 * (train/select.h). Expected strings follow C's printf rounding (ISO C
 * 7.21.6.1); the selection cases are recorded epoch metrics of our own. */
#include <math.h>

#include "core/fmt.h"
#include "test.h"
#include "train/select.h"

#define CHECK_FMT(v, sig, plus, want)                                                                     \
  do {                                                                                                    \
    char got_[64];                                                                                        \
    rc__fmt_sig(got_, sizeof got_, (v), (sig), (plus));                                                   \
    if (strcmp(got_, (want))) {                                                                           \
      fprintf(stderr, "%s:%d: rc__fmt_sig(%s, %d, %d): got \"%s\", want \"%s\"\n", __FILE__, __LINE__, #v, \
              (sig), (plus), got_, (want));                                                               \
      test_failed_checks_++;                                                                              \
      test_case_failed_ = 1;                                                                              \
    }                                                                                                     \
  } while (0)

static void formatter_small_values_keep_their_digits(void) {
  CHECK_FMT(1e-7, 4, 0, "1.000e-7");
  CHECK_FMT(1e-5, 4, 0, "1.000e-5");
  CHECK_FMT(2.346e-7, 3, 0, "2.35e-7");
  CHECK_FMT(0.001234, 4, 0, "0.001234");
  CHECK_FMT(0.0009999, 4, 0, "9.999e-4");
}

static void formatter_ordinary_and_large_values(void) {
  CHECK_FMT(0.5, 4, 0, "0.5000");
  CHECK_FMT(0.03584, 4, 0, "0.03584");
  CHECK_FMT(12.0193, 4, 0, "12.02");
  CHECK_FMT(123456, 4, 0, "123456");
  CHECK_FMT(999999.7, 4, 0, "1.000e6"); /* rounds up into the next decade */
  CHECK_FMT(1234567, 4, 0, "1.235e6");
  CHECK_FMT(9.99996, 4, 0, "10.00");
}

static void formatter_signs_zero_and_non_finite(void) {
  CHECK_FMT(-0.5, 4, 0, "-0.5000");
  CHECK_FMT(-1e-7, 4, 1, "-1.000e-7");
  CHECK_FMT(1e-7, 4, 1, "+1.000e-7");
  CHECK_FMT(53.125, 3, 1, "+53.1");
  CHECK_FMT(0.0, 4, 0, "0");
  CHECK_FMT(-0.0, 4, 1, "0");
  CHECK_FMT(NAN, 4, 0, "nan");
  CHECK_FMT(INFINITY, 4, 0, "inf");
  CHECK_FMT(-INFINITY, 4, 1, "-inf");
  CHECK_FMT(0.5, 0, 0, "0.5"); /* fewer than one digit asks for one */
  char small[4];
  rc__fmt_sig(small, sizeof small, 1e-7, 4, 0); /* truncated, still terminated */
  CHECK_INT(strlen(small), 3);
}

/* A 100-fold change of a small KL stays visible. */
static void formatter_shows_a_hundredfold_change(void) {
  char a[32], b[32];
  rc__fmt_sig(a, sizeof a, 1e-5, 4, 0);
  rc__fmt_sig(b, sizeof b, 1e-7, 4, 0);
  printf("1e-5 -> %s, 1e-7 -> %s\n", a, b);
  CHECK_STR_NE(a, b);
  CHECK_STR_NE(b, "0");
  CHECK_NULL(strstr(b, "0.0000"));
}

static rc_metrics val(double agreement, double kl, int has_labels, double top1, double ce) {
  rc_metrics m = {0};
  m.n = 102;
  m.has_ref = 1;
  m.agreement = agreement;
  m.kl = kl;
  m.has_labels = has_labels;
  m.top1 = top1;
  m.ce = ce;
  m.top5 = -1;
  return m;
}

/* Agreement rises by 2 of 102 samples while the KL triples: not better. */
static void agreement_up_kl_up_is_not_better(void) {
  rc_metrics input = val(50.0 / 102, 0.10, 0, 0, 0), worse = val(52.0 / 102, 0.30, 0, 0, 0);
  printf("input agreement %.4f KL %.2f, epoch agreement %.4f KL %.2f\n", input.agreement, input.kl, worse.agreement,
         worse.kl);
  CHECK_INT(rc__select_better(&worse, &input, 1.0), 0);
  CHECK_INT(rc__select_better(&input, &worse, 1.0), 1);
  CHECK_STR_EQ(rc__select_rule_name(&input, 1.0), "kl");
}

/* A recorded run: the kept epoch is the one with the lowest KL, whatever
 * agreement did; a run that never lowers the KL keeps the input. */
static void recorded_history_picks_lowest_kl(void) {
  rc_metrics input = val(0.50, 0.100, 0, 0, 0);
  rc_metrics hist[] = {val(0.53, 0.300, 0, 0, 0), val(0.49, 0.080, 0, 0, 0), val(0.55, 0.090, 0, 0, 0),
                       val(0.51, 0.070, 0, 0, 0), val(0.60, 0.071, 0, 0, 0)};
  int64_t pick = rc__select_best(&input, hist, 5, 1.0);
  printf("kept epoch %lld (KL %.3f)\n", (long long)pick, pick ? hist[pick - 1].kl : input.kl);
  CHECK_INT(pick, 4);
  rc_metrics up[] = {val(0.60, 0.2, 0, 0, 0), val(0.70, 0.15, 0, 0, 0)};
  CHECK_INT(rc__select_best(&input, up, 2, 1.0), 0);
  rc_metrics tiny_in = val(1, 1e-5, 0, 0, 0), tiny[] = {val(1, 1e-7, 0, 0, 0)};
  CHECK_INT(rc__select_best(&tiny_in, tiny, 1, 1.0), 1); /* same agreement, 100x lower KL: better */
}

/* With labels the figure is alpha·KL + (1 − alpha)·cross-entropy: higher
 * accuracy with a worse mix does not count; alpha = 1 leaves the KL alone. */
static void labels_mix_kl_and_cross_entropy(void) {
  rc_metrics input = val(0.8, 0.10, 1, 0.80, 0.50), acc_up = val(0.8, 0.20, 1, 0.82, 0.90);
  double want = 0.9 * 0.10 + 0.1 * 0.50;
  CHECK_NEAR(rc__select_measure(&input, 0.9), want, 1e-15, 0);
  CHECK_INT(rc__select_better(&acc_up, &input, 0.9), 0);
  CHECK_STR_EQ(rc__select_rule_name(&input, 0.9), "kl+cross_entropy");
  CHECK_NEAR(rc__select_measure(&input, 1.0), 0.10, 0, 0);
  rc_metrics ce_down = val(0.8, 0.11, 1, 0.80, 0.20); /* KL a little up, CE well down */
  printf("mix: input %.4f, candidate %.4f\n", rc__select_measure(&input, 0.9), rc__select_measure(&ce_down, 0.9));
  CHECK_INT(rc__select_better(&ce_down, &input, 0.9), 1);
}

static void nan_never_wins(void) {
  rc_metrics input = val(0.5, 0.1, 0, 0, 0), bad = val(0.9, NAN, 0, 0, 0), no_ref = input;
  no_ref.has_ref = 0;
  CHECK_INT(rc__select_better(&bad, &input, 1.0), 0);
  CHECK_INT(rc__select_better(&input, &bad, 1.0), 1);
  CHECK(isnan(rc__select_measure(&no_ref, 1.0)));
}

int main(void) {
  RUN(formatter_small_values_keep_their_digits);
  RUN(formatter_ordinary_and_large_values);
  RUN(formatter_signs_zero_and_non_finite);
  RUN(formatter_shows_a_hundredfold_change);
  RUN(agreement_up_kl_up_is_not_better);
  RUN(recorded_history_picks_lowest_kl);
  RUN(labels_mix_kl_and_cross_entropy);
  RUN(nan_never_wins);
  return TEST_REPORT();
}
