#!/usr/bin/python3
"""Run a model with onnxruntime-web (npm, via tests/ort/run.mjs under Node) on
one input and compare its first output with expected values.

Usage: /usr/bin/python3 scripts/ort_compare.py MODEL.onnx INPUT.npy EXPECTED.npy TOL [--opt LEVEL]

Passes when every element satisfies |ort - expected| <= TOL * (1 + |expected|)
and the shapes agree; prints the worst element either way. Node is taken from
$RECOUP_NODE, else `node` on PATH.
"""

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ORT_DIR = os.path.normpath(os.path.join(HERE, "..", "tests", "ort"))


def ort_version():
    try:
        with open(os.path.join(ORT_DIR, "node_modules", "onnxruntime-web", "package.json")) as f:
            return json.load(f)["version"]
    except (OSError, ValueError, KeyError):
        return "?"


def run_ort(model, inputs, opt):
    node = os.environ.get("RECOUP_NODE") or shutil.which("node")
    if not node:
        raise SystemExit("ort_compare: node not found (run scripts/setup.sh or set RECOUP_NODE)")
    if not os.path.isdir(os.path.join(ORT_DIR, "node_modules", "onnxruntime-web")):
        raise SystemExit(f"ort_compare: onnxruntime-web is not installed in {ORT_DIR} (run scripts/setup.sh)")
    with tempfile.TemporaryDirectory(prefix="recoup-ort-") as out:
        cmd = [node, os.path.join(ORT_DIR, "run.mjs"), model, out, *inputs, "--opt", opt]
        proc = subprocess.run(cmd, capture_output=True, text=True)
        if proc.returncode != 0:
            raise SystemExit(f"ort_compare: {proc.stderr.strip() or 'run.mjs exited with status %d' % proc.returncode}")
        return np.load(os.path.join(out, "0.npy"))


def compare(got, want, tol):
    """(ok, message) for |got - want| <= tol * (1 + |want|) elementwise."""
    if got.shape != want.shape:
        return False, f"shape {got.shape} from onnxruntime-web, expected {want.shape}"
    g = got.astype(np.float64)
    w = want.astype(np.float64)
    if g.size == 0:
        return True, "empty output"
    excess = np.abs(g - w) - tol * (1.0 + np.abs(w))
    excess = np.where(np.isnan(g) | np.isnan(w), np.inf, excess)
    i = int(np.argmax(excess))
    idx = np.unravel_index(i, g.shape)
    msg = (f"worst element {tuple(int(k) for k in idx)}: onnxruntime-web {g.flat[i]:.9g}, "
           f"expected {w.flat[i]:.9g}, |diff| {abs(g.flat[i] - w.flat[i]):.3g}, "
           f"allowed {tol * (1 + abs(w.flat[i])):.3g}")
    return bool(excess.flat[i] <= 0), msg


def main():
    ap = argparse.ArgumentParser(description="Compare onnxruntime-web's output with expected values.")
    ap.add_argument("model")
    ap.add_argument("input")
    ap.add_argument("expected")
    ap.add_argument("tol", type=float)
    ap.add_argument("--opt", default="all", choices=["disabled", "basic", "extended", "all"])
    args = ap.parse_args()
    want = np.load(args.expected)
    got = run_ort(args.model, [args.input], args.opt)
    ok, msg = compare(got, want, args.tol)
    src = f"onnxruntime-web {ort_version()} (npm, wasm, 1 thread, optimization {args.opt})"
    print(f"{os.path.basename(args.model)}: {src} vs {os.path.basename(args.expected)}: {msg}")
    if got.ndim == 2 and got.shape == want.shape:
        agree = int((got.argmax(1) == want.argmax(1)).sum())
        print(f"arg-max agrees on {agree}/{got.shape[0]} rows")
    if not ok:
        print(f"FAIL: {args.model}: outputs differ beyond tolerance {args.tol:g}", file=sys.stderr)
        return 1
    print("ok")
    return 0


if __name__ == "__main__":
    sys.exit(main())
