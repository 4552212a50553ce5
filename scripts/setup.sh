#!/usr/bin/env bash
# Install what recoup's build, demo and tests need on Debian 12, then the
# onnxruntime-web test runner's npm packages (tests/ort). Safe to run again:
# apt is skipped when every package is present, npm when node_modules matches
# tests/ort/package-lock.json. Runs as root, or through sudo otherwise.
set -euo pipefail

ROOT="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
ORT_DIR="$ROOT/tests/ort"

say() { printf 'setup: %s\n' "$*"; }
die() { printf 'setup: error: %s\n' "$*" >&2; exit 1; }

if [ "$(id -u)" -eq 0 ]; then
  SUDO=()
else
  command -v sudo >/dev/null 2>&1 || die "not root and sudo is not installed; run as root"
  SUDO=(sudo)
fi

PACKAGES=(
  # build
  build-essential cmake pkg-config
  libprotobuf-c-dev protobuf-c-compiler libonnx-dev
  libopenblas-openmp-dev zlib1g-dev libcjson-dev   # GEMM: OpenBLAS OpenMP build, shares our thread pool
  nettle-dev libzip-dev                            # SHA-256 of the batch ledger; the zip container of .npz
  libjpeg62-turbo-dev libpng-dev                   # image folders (JPEG, PNG)
  libopenmpi-dev openmpi-bin                       # optional: distill and batch over MPI ranks
  libdnnl-dev                                      # optional: oneDNN as a path for Conv (RECOUP_CONV_PATH=dnnl)
  # reference tests and demo (Debian's /usr/bin/python3)
  python3 python3-numpy python3-torch python3-torchvision python3-onnx python3-pil python3-scipy
  dataset-fashion-mnist libonnx-testdata
  # sanitizers and libFuzzer (libomp-dev: OpenMP for clang builds)
  clang libclang-rt-14-dev libomp-dev
  # formatting (.clang-format)
  clang-format
  # report tests
  chromium
)
# Node may come from another source with npm bundled; installing Debian's
# nodejs or npm over it would clash, so each is added only when missing.
if command -v node >/dev/null 2>&1; then
  say "node $(node --version) found at $(command -v node); not installing Debian's nodejs"
else
  PACKAGES+=(nodejs)
fi
if command -v npm >/dev/null 2>&1; then
  say "npm $(npm --version) found at $(command -v npm); not installing Debian's npm"
else
  PACKAGES+=(npm)
fi

missing=()
for p in "${PACKAGES[@]}"; do
  if ! dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q 'install ok installed'; then
    missing+=("$p")
  fi
done

if [ "${#missing[@]}" -eq 0 ]; then
  say "apt: all ${#PACKAGES[@]} packages already installed; skipping apt-get update and install"
else
  say "apt: missing ${missing[*]}"
  say "apt: apt-get update"
  "${SUDO[@]}" env DEBIAN_FRONTEND=noninteractive apt-get update \
    || die "apt-get update failed"
  say "apt: installing ${#missing[@]} package(s)"
  "${SUDO[@]}" env DEBIAN_FRONTEND=noninteractive apt-get install -y --no-install-recommends "${missing[@]}" \
    || die "apt-get install failed for: ${missing[*]}"
  for p in "${missing[@]}"; do
    dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q 'install ok installed' \
      || die "package $p is still not installed after apt-get install"
  done
  say "apt: installed ${missing[*]}"
fi

command -v node >/dev/null 2>&1 || die "node is still missing after installing nodejs"
command -v npm >/dev/null 2>&1 || die "npm is still missing after installing npm"
[ -x /usr/bin/python3 ] || die "/usr/bin/python3 is missing"
/usr/bin/python3 -c 'import numpy, onnx, torch, torchvision' \
  || die "Debian's /usr/bin/python3 cannot import numpy, onnx, torch and torchvision"
say "python: /usr/bin/python3 imports numpy, onnx, torch, torchvision"

# npm ci removes and rebuilds node_modules, so skip it when the installed tree
# came from this exact lock file (hash recorded after the last good install).
[ -f "$ORT_DIR/package-lock.json" ] || die "$ORT_DIR/package-lock.json is missing"
lock_hash="$(sha256sum "$ORT_DIR/package-lock.json" | cut -d' ' -f1)"
stamp="$ORT_DIR/node_modules/.recoup-lock-sha256"
if [ -f "$stamp" ] && [ "$(cat "$stamp")" = "$lock_hash" ] \
   && [ -f "$ORT_DIR/node_modules/onnxruntime-web/package.json" ]; then
  say "npm: tests/ort/node_modules matches package-lock.json; skipping npm ci"
else
  say "npm: npm ci in tests/ort"
  # No install scripts: onnxruntime-web needs none, and none should run here.
  (cd "$ORT_DIR" && npm ci --ignore-scripts --no-audit --no-fund) || die "npm ci in tests/ort failed"
  printf '%s\n' "$lock_hash" > "$stamp"
  say "npm: installed tests/ort/node_modules"
fi
ort_version="$(cd "$ORT_DIR" && node --input-type=module \
  -e "import * as ort from 'onnxruntime-web'; import { readFileSync } from 'node:fs';
      if (typeof ort.InferenceSession !== 'function') throw new Error('no InferenceSession');
      console.log(JSON.parse(readFileSync('node_modules/onnxruntime-web/package.json')).version);")" \
  || die "onnxruntime-web does not load under node $(node --version)"
say "npm: onnxruntime-web $ort_version loads under node $(node --version)"
say "done"
