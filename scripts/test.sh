#!/usr/bin/env bash
# The whole test suite, as CI runs it: set-up, a release build with every
# test, then the same suite built with AddressSanitizer and
# UndefinedBehaviorSanitizer (reusing the reference models the release run
# exported), then every libFuzzer target for a bounded time.
#
# Environment: RECOUP_FUZZ_SECONDS (default 20) per fuzz target, 0 skips
# fuzzing. Every stage runs even when an earlier one fails; the exit status
# is non-zero when any did.
set -uo pipefail
here=$(cd "$(dirname "$0")/.." && pwd)
start=$SECONDS
failed=()

stage() {
  local name=$1
  shift
  local t0=$SECONDS
  echo "== $name"
  if "$@"; then
    echo "== $name: passed in $((SECONDS - t0)) s"
  else
    echo "== $name: FAILED after $((SECONDS - t0)) s"
    failed+=("$name")
  fi
}

release_suite() {
  "$here/scripts/build.sh" "$here/build" &&
    (cd "$here/build" && ctest --output-on-failure -j 2 --timeout 900)
}

sanitizer_suite() {
  # -O1, as the sanitizers' documentation suggests: -O0 makes the model
  # tests several times slower and finds nothing more.
  cmake -S "$here" -B "$here/build-asan" -DCMAKE_BUILD_TYPE=Debug -DCMAKE_C_FLAGS_DEBUG="-g -O1" \
    -DRECOUP_SANITIZE=ON -DRECOUP_REFERENCE_DIR="$here/build/reference" >/dev/null &&
    cmake --build "$here/build-asan" -j "$(nproc)" &&
    (cd "$here/build-asan" &&
      ASAN_OPTIONS=detect_leaks=1 UBSAN_OPTIONS=print_stacktrace=1:halt_on_error=1 \
        ctest --output-on-failure -j 2 --timeout 900)
}

"$here/scripts/setup.sh" || exit 1
stage "release build and tests" release_suite
stage "AddressSanitizer/UndefinedBehaviorSanitizer build and tests" sanitizer_suite
fuzz_seconds=${RECOUP_FUZZ_SECONDS:-20}
if [ "$fuzz_seconds" -gt 0 ]; then
  stage "fuzzing (${fuzz_seconds} s per target)" "$here/scripts/fuzz.sh" "$fuzz_seconds"
fi

echo "whole suite: $((SECONDS - start)) s"
if [ ${#failed[@]} -gt 0 ]; then
  printf 'failed: %s\n' "${failed[@]}"
  exit 1
fi
