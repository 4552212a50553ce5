#!/usr/bin/env bash
# Installs everything the build, the demo and the tests need on Debian 12:
# Debian packages through apt, and the npm test runner in tests/ort.
# Idempotent: a second run finds everything present and changes nothing.
set -euo pipefail
here=$(cd "$(dirname "$0")/.." && pwd)

packages=(
  build-essential cmake pkg-config            # compiler and build
  libprotobuf-c-dev protobuf-c-compiler       # ONNX files (protobuf-c)
  libonnx-dev                                 # the ONNX standard's onnx.proto
  libopenblas-openmp-dev                      # GEMM, OpenMP build (shares our thread pool)
  zlib1g-dev libcjson-dev                     # .npz/.gz data, JSON
  python3 python3-numpy python3-torch python3-torchvision python3-onnx   # reference tests only
  dataset-fashion-mnist                       # demo and end-to-end tests
  libonnx-testdata                            # ONNX's own backend test data
  clang libclang-rt-14-dev                    # sanitizers and libFuzzer
  chromium                                    # report rendering tests
  nodejs                                      # onnxruntime-web tests
)

sudo_if_needed() {
  if [ "$(id -u)" -eq 0 ]; then "$@"; else sudo "$@"; fi
}

missing=()
for p in "${packages[@]}"; do
  dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
done
# npm may come with a nodejs from elsewhere; install Debian's only when absent.
command -v npm >/dev/null 2>&1 || missing+=(npm)

if [ ${#missing[@]} -gt 0 ]; then
  echo "setup: installing ${missing[*]}"
  sudo_if_needed apt-get update -qq
  DEBIAN_FRONTEND=noninteractive sudo_if_needed apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null
else
  echo "setup: Debian packages present"
fi

# onnxruntime-web, pinned by tests/ort/package-lock.json.
ort="$here/tests/ort"
if [ ! -d "$ort/node_modules/onnxruntime-web" ] || [ "$ort/package-lock.json" -nt "$ort/node_modules/.package-lock.json" ]; then
  echo "setup: installing onnxruntime-web (npm ci in tests/ort)"
  (cd "$ort" && npm ci --no-audit --no-fund --loglevel=error)
else
  echo "setup: onnxruntime-web present"
fi
