"""The model remembers how its inputs are prepared.

Usage: prep_test.py RECOUP SOURCE_DIR WORK_DIR

On Fashion-MNIST (Debian dataset-fashion-mnist) with the bundled models:
- a model written by `distill` with --scale carries it in metadata_props;
  `eval` of that model gives the same accuracy with and without repeating
  --scale, and says it used the recorded value; a different --scale wins,
  with a note;
- the keys survive onnx.checker (Debian python3-onnx) and the file runs in
  onnxruntime-web (npm), giving the outputs recoup gives;
- uint8 data fed to a model without recorded preprocessing and without
  --scale gets a one-line warning;
- `quantize` records the calibration preprocessing, and --limit N calibrates
  on N samples (reported in --json), the same N for any data source.
"""
import gzip
import json
import os
import shutil
import subprocess
import sys

import numpy as np
import onnx

from e2e import Run, SCALE, TEST_IMAGES, TEST_LABELS, TRAIN_IMAGES, run_ort

recoup, src, work = sys.argv[1], sys.argv[2], sys.argv[3]
shutil.rmtree(work, ignore_errors=True)
os.makedirs(work)
run = Run(recoup)
dense = os.path.join(src, "models", "garment_dense.onnx")
pruned = os.path.join(src, "models", "garment_pruned90.onnx")
out = os.path.join(work, "recovered.onnx")

run(["distill", "--teacher", dense, "--student", pruned, "--data", TRAIN_IMAGES, "--scale", SCALE, "--steps", "60",
     "--batch", "64", "--threads", "2", "--out", out])
meta = {p.key: p.value for p in onnx.load(out).metadata_props}
run.check("distill records --scale in metadata_props", abs(float(meta.get("recoup.input.scale", "nan")) - 1 / 255) < 1e-9,
          f"metadata {meta}")

with_scale = run.json(["eval", out, "--data", TEST_IMAGES, "--labels", TEST_LABELS, "--scale", SCALE, "--json"])
r = run(["eval", out, "--data", TEST_IMAGES, "--labels", TEST_LABELS, "--json"])
without = json.loads(r.stdout)
run.check("eval without --scale equals eval with it (recorded preprocessing used)",
          without["top1_accuracy"] == with_scale["top1_accuracy"],
          f"{100 * without['top1_accuracy']:.2f}% vs {100 * with_scale['top1_accuracy']:.2f}%")
run.check("eval says it used the recorded preprocessing", "recorded in" in r.stderr and "--scale" in r.stderr,
          r.stderr.strip()[:200])
r = run(["eval", out, "--data", TEST_IMAGES, "--labels", TEST_LABELS, "--scale", "1", "--json"])
run.check("a different --scale wins, with a note", "differs" in r.stderr and
          json.loads(r.stdout)["top1_accuracy"] != with_scale["top1_accuracy"], r.stderr.strip()[:200])

run.checker_accepts("recovered model with metadata", onnx.load(out))
x = np.frombuffer(gzip.open(TEST_IMAGES).read(), np.uint8, offset=16)[:64 * 784]
x = (x.reshape(64, 1, 28, 28).astype(np.float32) * np.float32(1 / 255))
np.save(os.path.join(work, "x.npy"), x)
ort = run_ort(out, os.path.join(work, "x.npy"), os.path.join(work, "ort"))
run(["eval", out, "--data", os.path.join(work, "x.npy"), "--scale", "1", "--out", os.path.join(work, "y.npy")])
mine = np.load(os.path.join(work, "y.npy"))
diff = float(np.abs(ort - mine).max())
run.check("onnxruntime-web runs the file with the keys, outputs within 1e-4 of recoup's", diff < 1e-4,
          f"max |diff| {diff:.2e}")

r = subprocess.run([recoup, "eval", dense, "--data", TEST_IMAGES, "--labels", TEST_LABELS], capture_output=True,
                   text=True)
warn = [ln for ln in r.stderr.splitlines() if ln.startswith("warning:")]
run.check("uint8 data, no recorded preprocessing, no --scale: one warning line", r.returncode == 0 and len(warn) == 1
          and "--scale" in warn[0], warn[0] if warn else r.stderr[:200])
r = subprocess.run([recoup, "eval", dense, "--data", TEST_IMAGES, "--scale", SCALE], capture_output=True, text=True)
run.check("with --scale there is no warning", "warning" not in r.stderr, r.stderr.strip()[:200])

q = os.path.join(work, "q.onnx")
js = run.json(["quantize", dense, "--data", TEST_IMAGES, "--scale", SCALE, "--limit", "500", "--out", q, "--json"])
qmeta = {p.key: p.value for p in onnx.load(q).metadata_props}
run.check("quantize records the calibration preprocessing", "recoup.input.scale" in qmeta, f"{qmeta}")
calib = js.get("calibration_samples")
run.check("quantize --limit 500 calibrates on 500 samples", calib == 500, f"calibration_samples {calib}")
run.finish()
