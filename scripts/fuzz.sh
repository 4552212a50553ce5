#!/usr/bin/env bash
# Build the libFuzzer targets (tests/fuzz) with clang, AddressSanitizer and
# UndefinedBehaviorSanitizer into build-fuzz/, then run each for a bounded
# time from the committed seed corpus (tests/fuzz/corpus/<target>).
#
# Usage: scripts/fuzz.sh [SECONDS_PER_TARGET] [TARGET ...]
#   SECONDS_PER_TARGET  default 60 (or $FUZZ_SECONDS)
#   TARGET              onnx npy npz idx tensorproto image (default: all)
# Environment: FUZZ_MIN_EXECS (default 10000) executions each target must
# reach; FUZZ_JOBS (default: number of cores) targets run at once;
# FUZZ_BUILD (default build-fuzz) the build folder.
#
# Fails when a target crashes, leaks or trips a sanitizer (the input is left
# in build-fuzz/artifacts/<target>/: fix the bug, then add the input to
# tests/fuzz/regressions/<target>/ so test_fuzz_regressions replays it), or
# when a target runs fewer than FUZZ_MIN_EXECS inputs (too slow to fuzz).
set -euo pipefail
here=$(cd "$(dirname "$0")/.." && pwd)
seconds=${1:-${FUZZ_SECONDS:-60}}
shift || true
targets=("$@")
[ ${#targets[@]} -gt 0 ] || targets=(onnx npy npz idx tensorproto image)
min_execs=${FUZZ_MIN_EXECS:-10000}
jobs=${FUZZ_JOBS:-$(nproc)}
build=${FUZZ_BUILD:-"$here/build-fuzz"}

mkdir -p "$build"
if ! { CC=clang cmake -S "$here" -B "$build" -DRECOUP_FUZZ=ON -DCMAKE_BUILD_TYPE=RelWithDebInfo &&
  cmake --build "$build" -j "$(nproc)" --target fuzz_targets; } >"$build/build.log" 2>&1; then
  tail -30 "$build/build.log" >&2
  echo "fuzz.sh: building the fuzz targets failed (log $build/build.log)" >&2
  exit 1
fi

export ASAN_OPTIONS=detect_leaks=1:allocator_may_return_null=0
export UBSAN_OPTIONS=print_stacktrace=1:halt_on_error=1
export OMP_NUM_THREADS=1

run_one() {
  local t=$1
  local work="$build/fuzz-work/$t" art="$build/artifacts/$t/" log="$build/fuzz-$t.log"
  mkdir -p "$work" "$art"
  local status=0
  # The first corpus folder receives new inputs; the committed seeds stay as they are.
  "$build/tests/fuzz/fuzz_$t" -max_total_time="$seconds" -print_final_stats=1 -timeout=20 \
    -rss_limit_mb=2560 -artifact_prefix="$art" "$work" "$here/tests/fuzz/corpus/$t" \
    >"$log" 2>&1 || status=$?
  local execs
  execs=$(sed -n 's/^stat::number_of_executed_units: *\([0-9]*\).*/\1/p' "$log" | tail -1)
  if [ "$status" -ne 0 ]; then
    echo "fuzz_$t: FAILED (exit $status); input saved under $art; log $log" >&2
    grep -E "^(==[0-9]+==ERROR|SUMMARY|.*runtime error)" "$log" | head -5 >&2 || true
    return 1
  fi
  if [ -z "$execs" ] || [ "$execs" -lt "$min_execs" ]; then
    echo "fuzz_$t: only ${execs:-0} executions in ${seconds}s, need $min_execs; log $log" >&2
    return 1
  fi
  echo "fuzz_$t: $execs executions in ${seconds}s, no crash"
}

failed=0
pids=()
names=()
for t in "${targets[@]}"; do
  if [ ! -d "$here/tests/fuzz/corpus/$t" ]; then
    echo "fuzz.sh: unknown target '$t'" >&2
    exit 2
  fi
  run_one "$t" &
  pids+=($!)
  names+=("$t")
  if [ ${#pids[@]} -ge "$jobs" ]; then
    wait "${pids[0]}" || failed=1
    pids=("${pids[@]:1}")
    names=("${names[@]:1}")
  fi
done
for p in "${pids[@]}"; do wait "$p" || failed=1; done
exit $failed
