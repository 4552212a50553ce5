/* A small test harness: checks print both sides and the place, a test file's
 * main() runs its cases and prints "N passed, M failed". */
#ifndef RC_TEST_H
#define RC_TEST_H

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

static int test_failed_checks_;
static int test_case_failed_;
static int test_passed_, test_failed_;

#define CHECK(cond)                                                          \
  do {                                                                       \
    if (!(cond)) {                                                           \
      fprintf(stderr, "%s:%d: check failed: %s\n", __FILE__, __LINE__, #cond); \
      test_failed_checks_++;                                                 \
      test_case_failed_ = 1;                                                 \
    }                                                                        \
  } while (0)

#define CHECK_INT(a, b)                                                               \
  do {                                                                                \
    long long ta_ = (long long)(a), tb_ = (long long)(b);                             \
    if (ta_ != tb_) {                                                                 \
      fprintf(stderr, "%s:%d: %s == %s failed: %lld vs %lld\n", __FILE__, __LINE__, #a, \
              #b, ta_, tb_);                                                          \
      test_failed_checks_++;                                                          \
      test_case_failed_ = 1;                                                          \
    }                                                                                 \
  } while (0)

/* |a - b| <= atol + rtol * |b| */
#define CHECK_NEAR(a, b, atol, rtol)                                                       \
  do {                                                                                     \
    double ta_ = (double)(a), tb_ = (double)(b);                                           \
    if (!(fabs(ta_ - tb_) <= (atol) + (rtol)*fabs(tb_))) {                                 \
      fprintf(stderr, "%s:%d: %s ~ %s failed: %.9g vs %.9g\n", __FILE__, __LINE__, #a, #b, \
              ta_, tb_);                                                                   \
      test_failed_checks_++;                                                               \
      test_case_failed_ = 1;                                                               \
    }                                                                                      \
  } while (0)

#define CHECK_STR_CONTAINS(hay, needle)                                                   \
  do {                                                                                    \
    const char *th_ = (hay), *tn_ = (needle);                                             \
    if (!th_ || !strstr(th_, tn_)) {                                                      \
      fprintf(stderr, "%s:%d: \"%s\" does not contain \"%s\"\n", __FILE__, __LINE__,     \
              th_ ? th_ : "(null)", tn_);                                                 \
      test_failed_checks_++;                                                              \
      test_case_failed_ = 1;                                                              \
    }                                                                                     \
  } while (0)

#define RUN(fn)                                         \
  do {                                                  \
    test_case_failed_ = 0;                              \
    fn();                                               \
    if (test_case_failed_) {                            \
      test_failed_++;                                   \
      fprintf(stderr, "FAIL %s\n", #fn);                \
    } else {                                            \
      test_passed_++;                                   \
    }                                                   \
  } while (0)

#define TEST_REPORT()                                              \
  (printf("%d passed, %d failed\n", test_passed_, test_failed_), \
   test_failed_ ? 1 : 0)

#endif
