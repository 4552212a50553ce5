#!/usr/bin/python3
"""`recoup quantize` on the demo's dense garment classifier, checked against
outside references.

- Model: models/garment_dense.onnx, written by scripts/train_demo_model.py
  (the demo). Missing model: the test FAILS with a message saying how to make it.
- Data: Fashion-MNIST (Xiao, Rasul, Vollgraf 2017; Debian dataset-fashion-mnist),
  pixels scaled by 1/255 as the model was trained. Calibration: the first 1000
  training images.
- The ONNX checker (Debian python3-onnx, onnx 1.12) accepts both outputs. The
  4-bit variant: the model's opset is 13 and onnx 1.12 has no int4 type, so
  recoup stores the 4-bit values on int8 tensors restricted to [-7, 7], which
  this checker accepts; the test reads the weights back with the onnx package
  and checks that range.
- onnxruntime-web (npm, tests/ort/run.mjs, optimisation disabled so the QDQ
  graph runs as written) gives the same logits as `recoup eval --out` within
  a few steps of the output grid.
- `recoup inspect --json` lists the weight, bias and activation grids.
- Accuracy on the 10,000 test images (recoup eval with labels): 8-bit stays
  close to the dense model and 4-bit weights lose accuracy. Measured on the
  demo model (scripts/train_demo_model.py, 4 epochs, dense 0.9201): 8-bit
  0.9231, 4-bit weights 0.9099 (MEASURED below).

Usage: quantize_test.py RECOUP_BINARY SOURCE_DIR WORK_DIR
"""

import json
import os
import subprocess
import sys

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from e2e import DATA, SCALE, TEST_IMAGES, TEST_LABELS, TRAIN_IMAGES, Run, require_data, run_ort

RECOUP, SRC, WORK = sys.argv[1:4]
MODEL = os.environ.get("RECOUP_GARMENT_MODEL", os.path.join(SRC, "models", "garment_dense.onnx"))

# Test-set accuracy measured with this test on the demo model (see the
# docstring); printed again on every run. The checks compare with the dense
# model's accuracy measured in the same run, not with these numbers.
MEASURED = ("dense 0.9201, 8-bit weights and activations 0.9231, 4-bit weights with 8-bit activations 0.9099 "
            "(run of 5 Dec 2026 with the default output margin 0.1; 8-bit 0.9235 without it; ONNX Runtime Web "
            "matched recoup exactly)")

require_data(TRAIN_IMAGES, TEST_IMAGES, TEST_LABELS)
run = Run(RECOUP)
check = run.check


def read_idx(path):
    """IDX as published for Fashion-MNIST: magic 0x0803 (unsigned bytes, rank 3), big-endian dims."""
    import gzip
    with gzip.open(path, "rb") as f:
        raw = f.read()
    rank = raw[3]
    dims = [int.from_bytes(raw[4 + 4 * i:8 + 4 * i], "big") for i in range(rank)]
    return np.frombuffer(raw, np.uint8, offset=4 + 4 * rank).reshape(dims)


def check_model_file(name, path, weight_range):
    """Checker, structure and weight range of a written QDQ model, read with the onnx package."""
    m = onnx.load(path)
    run.checker_accepts(name, m)
    ops = [n.op_type for n in m.graph.node]
    check(f"{name}: BatchNormalization folded away", "BatchNormalization" not in ops, str(ops))
    check(f"{name}: layers kept", ops.count("Conv") == 3 and ops.count("Gemm") == 2, str(ops))
    inits = {t.name: numpy_helper.to_array(t) for t in m.graph.initializer}
    dq_inputs = [n.input[0] for n in m.graph.node if n.op_type == "DequantizeLinear"]
    weights = [inits[k] for k in dq_inputs if k in inits and inits[k].dtype == np.int8]
    check(f"{name}: five int8 weight tensors", len(weights) == 5, str(len(weights)))
    lo = min(int(w.min()) for w in weights) if weights else 0
    hi = max(int(w.max()) for w in weights) if weights else 0
    check(f"{name}: weights within [-{weight_range}, {weight_range}] and reaching its end",
          -weight_range <= lo and hi <= weight_range and max(-lo, hi) == weight_range, f"{lo}..{hi}")
    biases = [inits[k] for k in dq_inputs if k in inits and inits[k].dtype == np.int32]
    check(f"{name}: five int32 biases", len(biases) == 5, str(len(biases)))
    q_inputs = [n.input[0] for n in m.graph.node if n.op_type == "QuantizeLinear"]
    check(f"{name}: one QuantizeLinear per tensor", len(q_inputs) == len(set(q_inputs)) and len(q_inputs) >= 6,
          str(q_inputs))


def cli_refusals():
    """Bad requests end in one clear error and write nothing (no demo model needed)."""
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 4])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 3])
    w = numpy_helper.from_array(np.arange(12, dtype=np.float32).reshape(3, 4) / 10, "w")
    g = helper.make_graph([helper.make_node("Gemm", ["x", "w"], ["y"], transB=1)], "g", [x], [y], [w])
    old = os.path.join(WORK, "opset12.onnx")
    onnx.save(helper.make_model(g, opset_imports=[helper.make_opsetid("", 12)]), old)
    data = os.path.join(WORK, "x4.npy")
    np.save(data, np.ones((8, 4), np.float32))
    out = os.path.join(WORK, "never.onnx")
    r = subprocess.run([RECOUP, "quantize", old, "--data", data, "--out", out], capture_output=True, text=True)
    check("opset 12 refused with a reason", r.returncode == 1 and "opset 13" in r.stderr and not os.path.exists(out),
          r.stderr.strip())
    r = subprocess.run([RECOUP, "quantize", old, "--data", data, "--out", old], capture_output=True, text=True)
    check("output over the input refused", r.returncode == 1 and "overwrite" in r.stderr, r.stderr.strip())
    r = subprocess.run([RECOUP, "quantize", old, "--data", data, "--out", out, "--weight-bits", "2"],
                       capture_output=True, text=True)
    check("--weight-bits 2 is a usage error", r.returncode == 2 and "--weight-bits" in r.stderr, r.stderr.strip())


def main():
    os.makedirs(WORK, exist_ok=True)
    cli_refusals()
    if not os.path.isfile(MODEL):
        raise SystemExit(f"FAIL: {MODEL} is missing: it is the demo's model, made by "
                         "/usr/bin/python3 scripts/train_demo_model.py (or set RECOUP_GARMENT_MODEL)")
    for f in (TRAIN_IMAGES, TEST_IMAGES, TEST_LABELS):
        if not os.path.isfile(f):
            raise SystemExit(f"FAIL: {f} is missing: install Debian's dataset-fashion-mnist ({DATA})")
    calib = os.path.join(WORK, "calib1000.npy")
    np.save(calib, read_idx(TRAIN_IMAGES)[:1000])
    probe = os.path.join(WORK, "probe256.npy")
    np.save(probe, (read_idx(TEST_IMAGES)[:256].astype(np.float32) / np.float32(255))[:, None, :, :])

    for name, bits, qmax in (("w8a8", "8", 127), ("w4a8", "4", 7)):
        out = os.path.join(WORK, f"garment_{name}.onnx")
        if os.path.exists(out):
            os.remove(out)
        rep = run.json(["quantize", MODEL, "--data", calib, "--scale", SCALE, "--out", out, "--weight-bits", bits,
                        "--activation-bits", "8", "--json"])
        check(f"{name}: calibrated on 1000 images", rep["calibration_samples"] == 1000, str(rep["calibration_samples"]))
        check(f"{name}: three BatchNormalization folded", rep["bn_folded"] == 3, str(rep["bn_folded"]))
        check(f"{name}: five layers quantized", len(rep["layers"]) == 5, str(len(rep["layers"])))
        check(f"{name}: file smaller", rep["bytes_after"] < rep["bytes_before"],
              f"{rep['bytes_before']} -> {rep['bytes_after']} bytes")
        floor = 0.97 if bits == "8" else 0.85
        check(f"{name}: top-1 agreement with the float model on the calibration images >= {floor}",
              rep["top1_agreement"] >= floor, f"{rep['top1_agreement']:.4f}")
        if bits == "4":
            check(f"{name}: opset 13 has no int4: int8 fallback reported",
                  rep["int4_stored_as_int8"] and rep["weight_dtype"] == "int8", rep["weight_dtype"])
        check_model_file(name, out, qmax)

        # onnxruntime-web against recoup eval on the same 256 test images.
        mine = os.path.join(WORK, f"{name}_recoup.npy")
        run(["eval", out, "--data", probe, "--out", mine])
        want = np.load(mine)
        got = run_ort(out, probe, os.path.join(WORK, f"{name}_ort"))
        steps = [g["scale"] for g in rep["activation_grids"] if g["tensor"] == "logits"]
        check(f"{name}: the logits have an activation grid", len(steps) == 1, f"{len(steps)} grids: {steps}")
        step = steps[0] if steps else 1.0
        same_shape = got.shape == want.shape
        diff = float(np.abs(got.astype(np.float64) - want).max()) if same_shape else float("inf")
        check(f"{name}: onnxruntime-web equals recoup eval within 3 output steps", same_shape and diff <= 3 * step,
              f"max |diff| {diff:.3g}, step {step:.3g}, arg-max agrees on "
              f"{int((got.argmax(1) == want.argmax(1)).sum()) if same_shape else 0}/256")

        # inspect lists the grids: 5 int8 weights, 5 int32 biases and every activation pair.
        grids = run.json(["inspect", out, "--json"]).get("grids", [])
        kinds = [g["dtype"] for g in grids if g.get("kind") == "weight"]
        check(f"{name}: inspect lists 5 int8 and 5 int32 weight grids",
              kinds.count("int8") == 5 and kinds.count("int32") == 5, str(kinds))
        acts = [g for g in grids if g.get("kind") != "weight"]
        check(f"{name}: inspect lists every activation grid", len(acts) == len(rep["activation_grids"]),
              f"{len(acts)} listed, {len(rep['activation_grids'])} made")

    acc = {"dense": run.test_accuracy(MODEL)}
    for name in ("w8a8", "w4a8"):
        acc[name] = run.test_accuracy(os.path.join(WORK, f"garment_{name}.onnx"))
    print(f"test accuracy (10,000 Fashion-MNIST test images): dense {acc['dense']:.4f}, "
          f"8-bit {acc['w8a8']:.4f}, 4-bit weights {acc['w4a8']:.4f}; recorded for the demo model: {MEASURED}")
    check("4-bit weights cost accuracy against the dense model", acc["w4a8"] < acc["dense"],
          f"({acc['w4a8']:.4f} < {acc['dense']:.4f})")
    check("8-bit loses at most 1.5 points", acc["w8a8"] >= acc["dense"] - 0.015,
          f"({acc['w8a8']:.4f} >= {acc['dense']:.4f} - 0.015)")
    check("4-bit loses at most 15 points", acc["w4a8"] >= acc["dense"] - 0.15,
          f"({acc['w4a8']:.4f} >= {acc['dense']:.4f} - 0.15)")
    run.finish()


if __name__ == "__main__":
    main()
