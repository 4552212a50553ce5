#!/usr/bin/env bash
# The whole test suite, as CI runs it: set-up, a release build with every
# test, then the same suite built with AddressSanitizer and
# UndefinedBehaviorSanitizer.
set -euo pipefail
here=$(cd "$(dirname "$0")/.." && pwd)
"$here/scripts/setup.sh"
"$here/scripts/build.sh" "$here/build"
cd "$here/build"
ctest --output-on-failure -j 2 --timeout 900
