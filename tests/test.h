/* A small test harness: checks print both sides and the place, a test file's
 * main() runs its cases and prints "N passed, M failed, K skipped". */
#ifndef RC_TEST_H
#define RC_TEST_H

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "recoup/status.h"

static int test_failed_checks_;
static int test_case_failed_;
static int test_passed_, test_failed_;

#define CHECK(cond)                                                          \
  do {                                                                       \
    if (!(cond)) {                                                           \
      fprintf(stderr, "%s:%d: check failed: %s\n", __FILE__, __LINE__, #cond); \
      TEST_FAIL_();                                                          \
    }                                                                        \
  } while (0)

#define TEST_FAIL_() (test_failed_checks_++, test_case_failed_ = 1)

/* Digits that show a value of x's type exactly (integers up to 64 bits are
 * exact in long double on every platform we build for). */
#define TEST_DIGITS_(x) _Generic((x), float: 9, double: 17, default: 21)

/* a OP b on numbers of any arithmetic type; prints both sides on failure.
 * Compared as long double, so mixing signed and unsigned compares values. */
#define TEST_CMP_(a, op, b)                                                                \
  do {                                                                                     \
    long double ta_ = (long double)(a), tb_ = (long double)(b);                            \
    if (!(ta_ op tb_)) {                                                                   \
      fprintf(stderr, "%s:%d: %s %s %s failed: %.*Lg vs %.*Lg\n", __FILE__, __LINE__, #a, \
              #op, #b, TEST_DIGITS_(a), ta_, TEST_DIGITS_(b), tb_);                        \
      TEST_FAIL_();                                                                        \
    }                                                                                      \
  } while (0)

#define CHECK_EQ(a, b) TEST_CMP_(a, ==, b)
#define CHECK_NE(a, b) TEST_CMP_(a, !=, b)
#define CHECK_LT(a, b) TEST_CMP_(a, <, b)
#define CHECK_LE(a, b) TEST_CMP_(a, <=, b)
#define CHECK_GT(a, b) TEST_CMP_(a, >, b)
#define CHECK_GE(a, b) TEST_CMP_(a, >=, b)

#define CHECK_INT(a, b)                                                               \
  do {                                                                                \
    long long ta_ = (long long)(a), tb_ = (long long)(b);                             \
    if (ta_ != tb_) {                                                                 \
      fprintf(stderr, "%s:%d: %s == %s failed: %lld vs %lld\n", __FILE__, __LINE__, #a, \
              #b, ta_, tb_);                                                          \
      TEST_FAIL_();                                                                   \
    }                                                                                 \
  } while (0)

/* A status code against the expected one, both by name. */
#define CHECK_STATUS(a, b)                                                                    \
  do {                                                                                        \
    int ta_ = (int)(a), tb_ = (int)(b);                                                       \
    if (ta_ != tb_) {                                                                         \
      fprintf(stderr, "%s:%d: %s == %s failed: %d (%s) vs %d (%s)\n", __FILE__, __LINE__, #a, \
              #b, ta_, rc_strerror(ta_), tb_, rc_strerror(tb_));                              \
      TEST_FAIL_();                                                                           \
    }                                                                                         \
  } while (0)

/* A call that must fail (any error code); prints the code it returned. */
#define CHECK_FAILS(a)                                                                   \
  do {                                                                                   \
    int ta_ = (int)(a);                                                                  \
    if (ta_ == RC_OK) {                                                                  \
      fprintf(stderr, "%s:%d: %s should have failed but returned RC_OK\n", __FILE__,     \
              __LINE__, #a);                                                             \
      TEST_FAIL_();                                                                      \
    }                                                                                    \
  } while (0)

#define TEST_PTR_(a, op, b)                                                                \
  do {                                                                                     \
    const void *ta_ = (const void *)(a), *tb_ = (const void *)(b);                         \
    if (!(ta_ op tb_)) {                                                                   \
      fprintf(stderr, "%s:%d: %s %s %s failed: %p vs %p\n", __FILE__, __LINE__, #a, #op, #b, \
              ta_, tb_);                                                                   \
      TEST_FAIL_();                                                                        \
    }                                                                                      \
  } while (0)

#define CHECK_PTR_EQ(a, b) TEST_PTR_(a, ==, b)
#define CHECK_PTR_NE(a, b) TEST_PTR_(a, !=, b)
#define CHECK_NULL(a) TEST_PTR_(a, ==, NULL)
#define CHECK_NOT_NULL(a) TEST_PTR_(a, !=, NULL)

/* Two strings equal (want_equal 1) or different (0); NULL never passes. */
#define TEST_STR_(a, b, want_equal, op)                                                    \
  do {                                                                                     \
    const char *ta_ = (a), *tb_ = (b);                                                     \
    if (!ta_ || !tb_ || (strcmp(ta_, tb_) == 0) != (want_equal)) {                         \
      fprintf(stderr, "%s:%d: %s %s %s failed: \"%s\" vs \"%s\"\n", __FILE__, __LINE__, #a, \
              op, #b, ta_ ? ta_ : "(null)", tb_ ? tb_ : "(null)");                         \
      TEST_FAIL_();                                                                        \
    }                                                                                      \
  } while (0)

#define CHECK_STR_EQ(a, b) TEST_STR_(a, b, 1, "==")
#define CHECK_STR_NE(a, b) TEST_STR_(a, b, 0, "!=")

/* n bytes equal; prints the first byte that differs. */
#define CHECK_MEM_EQ(a, b, n)                                                              \
  do {                                                                                     \
    const unsigned char *ta_ = (const unsigned char *)(a), *tb_ = (const unsigned char *)(b); \
    size_t tn_ = (size_t)(n), ti_ = 0;                                                     \
    while (ti_ < tn_ && ta_[ti_] == tb_[ti_]) ti_++;                                       \
    if (ti_ < tn_) {                                                                       \
      fprintf(stderr, "%s:%d: %s == %s (%zu bytes) failed: byte %zu is 0x%02x vs 0x%02x\n", \
              __FILE__, __LINE__, #a, #b, tn_, ti_, ta_[ti_], tb_[ti_]);                  \
      TEST_FAIL_();                                                                        \
    }                                                                                      \
  } while (0)

#define CHECK_MEM_NE(a, b, n)                                                              \
  do {                                                                                     \
    if (memcmp((a), (b), (size_t)(n)) == 0) {                                              \
      fprintf(stderr, "%s:%d: %s != %s (%zu bytes) failed: all bytes equal\n", __FILE__,  \
              __LINE__, #a, #b, (size_t)(n));                                              \
      TEST_FAIL_();                                                                        \
    }                                                                                      \
  } while (0)

/* |a - b| <= atol + rtol * |b| */
#define CHECK_NEAR(a, b, atol, rtol)                                                       \
  do {                                                                                     \
    double ta_ = (double)(a), tb_ = (double)(b);                                           \
    if (!(fabs(ta_ - tb_) <= (atol) + (rtol)*fabs(tb_))) {                                 \
      fprintf(stderr, "%s:%d: %s ~ %s failed: %.9g vs %.9g\n", __FILE__, __LINE__, #a, #b, \
              ta_, tb_);                                                                   \
      TEST_FAIL_();                                                                        \
    }                                                                                      \
  } while (0)

#define CHECK_STR_CONTAINS(hay, needle)                                                   \
  do {                                                                                    \
    const char *th_ = (hay), *tn_ = (needle);                                             \
    if (!th_ || !strstr(th_, tn_)) {                                                      \
      fprintf(stderr, "%s:%d: \"%s\" does not contain \"%s\"\n", __FILE__, __LINE__,     \
              th_ ? th_ : "(null)", tn_);                                                 \
      TEST_FAIL_();                                                                       \
    }                                                                                     \
  } while (0)

/* Opens `file` in the reference folder $RECOUP_BINARY_DIR/dir written by a
 * PyTorch script run as a ctest fixture; the folder's path goes into
 * folder (n bytes). When it cannot, says which script and fixture write
 * the file and returns NULL. */
static inline FILE *test_ref_open(char *folder, size_t n, const char *dir, const char *file, const char *script,
                                  const char *fixture) {
  const char *bin = getenv("RECOUP_BINARY_DIR");
  snprintf(folder, n, "%s/%s", bin ? bin : ".", dir);
  char path[4352];
  snprintf(path, sizeof path, "%s/%s", folder, file);
  FILE *f = fopen(path, "r");
  if (!f)
    fprintf(stderr,
            "MISSING PyTorch reference data: %s\n(written by %s with Debian's /usr/bin/python3, the ctest "
            "fixture %s; run ctest, not this binary alone)\n",
            path, script, fixture);
  return f;
}

/* ctest's skip status (SKIP_RETURN_CODE on every C test): a test whose cases
 * were all skipped, e.g. for want of an installed data set, says so. */
#define TEST_SKIP_CODE 77

static int test_skipped_, test_case_skipped_;
static const char *test_only_; /* run just this case (TEST_SELECT) */

/* Ends the current case as skipped, saying why. */
#define SKIP_CASE(...)         \
  do {                         \
    printf("skipped: ");       \
    printf(__VA_ARGS__);       \
    printf("\n");              \
    test_case_skipped_ = 1;    \
    return;                    \
  } while (0)

/* `test_x NAME` runs only case NAME; cases registered with RUN_ALONE run
 * only that way, as their own ctest entry, so their skip shows in ctest. */
#define TEST_SELECT(argc, argv) (test_only_ = (argc) > 1 ? (argv)[1] : NULL)

#define TEST_RUN_(fn)                                   \
  do {                                                  \
    test_case_failed_ = test_case_skipped_ = 0;         \
    fn();                                               \
    if (test_case_failed_) {                            \
      test_failed_++;                                   \
      fprintf(stderr, "FAIL %s\n", #fn);                \
    } else if (test_case_skipped_) {                    \
      test_skipped_++;                                  \
    } else {                                            \
      test_passed_++;                                   \
    }                                                   \
  } while (0)

#define RUN(fn)                                          \
  do {                                                   \
    if (!test_only_ || !strcmp(test_only_, #fn)) TEST_RUN_(fn); \
  } while (0)

#define RUN_ALONE(fn)                                   \
  do {                                                  \
    if (test_only_ && !strcmp(test_only_, #fn)) TEST_RUN_(fn); \
  } while (0)

/* 1 on a failure or when no case ran (a selection naming no case), the skip
 * code when every case that ran was skipped, else 0. */
#define TEST_REPORT()                                                                          \
  (printf("%d passed, %d failed, %d skipped\n", test_passed_, test_failed_, test_skipped_),     \
   test_failed_ || test_passed_ + test_skipped_ == 0 ? 1                                      \
   : test_passed_ == 0                               ? TEST_SKIP_CODE                          \
                                                     : 0)

#endif
