#!/usr/bin/python3
"""`recoup prune` on the exported reference models, checked against outside
references:

- every written file passes the onnx package's checker with full shape
  inference (Debian python3-onnx: onnx.checker.check_model(full_check=True));
- it runs in onnxruntime-web (npm, via tests/ort/run.mjs) on the reference
  input, with finite outputs of the dense model's shape;
- the requested sparsity is what `recoup inspect --json` measures
  (weights[].zeros / total; pattern "2:4"), and the written weights read with
  onnx.numpy_helper agree with it;
- channel pruning reduces parameters and MACs (inspect's counts) and every
  narrowed weight keeps its rank.

Usage: prune_test.py RECOUP SOURCE_DIR REFERENCE_DIR WORK_DIR
REFERENCE_DIR holds <case>/model.onnx and input_0.npy written by
scripts/export_reference_models.py (the reference_models ctest fixture).
"""

import json
import os
import subprocess
import sys

import numpy as np
import onnx
from onnx import numpy_helper

from e2e import checker_verdict

RECOUP, SRC, REF, WORK = sys.argv[1:5]
os.makedirs(WORK, exist_ok=True)
CASES = ("resnet8_op13_bn", "mobilenet_v2_op13_bn")
RUNS = {
    "global90": ["--sparsity", "0.9"],
    "layer90": ["--sparsity", "0.9", "--scope", "layer"],
    "nm24": ["--pattern", "2:4"],
    "channels50": ["--channels", "0.5"],
}
PRUNABLE = {"Conv", "ConvTranspose", "Gemm", "MatMul"}
RESULTS = []  # (name, ok, detail), printed as they come


def check(name, ok, detail=""):
    RESULTS.append((name, bool(ok), detail))
    print(("ok  " if ok else "FAIL"), name, detail)


def recoup(args):
    r = subprocess.run([RECOUP] + args, capture_output=True, text=True, timeout=600)
    if r.returncode != 0:
        raise SystemExit(f"recoup {' '.join(args)} failed ({r.returncode}):\n{r.stderr}")
    return r.stdout


def inspect(path):
    return json.loads(recoup(["inspect", path, "--json"]))


def ort_run(model, inp, out_dir):
    """onnxruntime-web (npm) through tests/ort/run.mjs, as scripts/ort_compare.py calls it."""
    node = os.environ.get("RECOUP_NODE") or "node"
    cmd = [node, os.path.join(SRC, "tests", "ort", "run.mjs"), model, out_dir, inp]
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    if r.returncode != 0:
        return None, r.stderr.strip()
    return np.load(os.path.join(out_dir, "0.npy")), ""


def prunable_weights(model):
    """Names of float weights of prunable layers in node order (input 1)."""
    inits = {t.name for t in model.graph.initializer}
    names = []
    for n in model.graph.node:
        if n.op_type in PRUNABLE and len(n.input) > 1 and n.input[1] in inits and n.input[1] not in names:
            names.append(n.input[1])
    return names


def check_case(case):
    dense = os.path.join(REF, case, "model.onnx")
    inp = os.path.join(REF, case, "input_0.npy")
    if not os.path.exists(dense):
        raise SystemExit(f"missing {dense}: the reference_models fixture "
                         "(scripts/export_reference_models.py) did not run")
    y_dense, err = ort_run(dense, inp, os.path.join(WORK, case, "dense_out"))
    if y_dense is None:
        raise SystemExit(f"{case}: onnxruntime-web cannot run the dense model: {err}")
    info_dense = inspect(dense)
    for tag, args in RUNS.items():
        out = os.path.join(WORK, case, f"{tag}.onnx")
        os.makedirs(os.path.dirname(out), exist_ok=True)
        report = json.loads(recoup(["prune", dense, "--out", out, "--json"] + args))
        name = f"{case} {tag}"
        check(f"{name} onnx checker (full_check)", *checker_verdict(onnx.load(out), full_check=True))
        y, err = ort_run(out, inp, os.path.join(WORK, case, f"{tag}_out"))
        check(f"{name} runs in onnxruntime-web", y is not None, err)
        if y is not None:
            check(f"{name} output shape", y.shape == y_dense.shape, f"{y.shape} vs dense {y_dense.shape}")
            check(f"{name} outputs finite", bool(np.isfinite(y).all()),
                  f"{int((~np.isfinite(y)).sum())} of {y.size} not finite")
        info = inspect(out)
        model = onnx.load(out)
        weights = prunable_weights(model)
        by_name = {w["name"]: w for w in info["weights"]}
        inner = weights[1:-1]  # first and last stay dense by default
        if tag in ("global90", "layer90"):
            z = sum(by_name[w]["zeros"] for w in inner)
            t = sum(by_name[w]["total"] for w in inner)
            # Ties are broken by position, so counts are exact: round(0.9 * t)
            # over all inner layers at once, or per layer for --scope layer.
            want = (int(np.floor(0.9 * t + 0.5)) if tag == "global90" else
                    sum(int(np.floor(0.9 * by_name[w]["total"] + 0.5)) for w in inner))
            check(f"{name} sparsity over inner layers", z == want, f"{z}/{t}, want {want}")
            for edge in (weights[0], weights[-1]):
                check(f"{name} {edge} kept dense", by_name[edge]["zeros"] == 0, f"{by_name[edge]['zeros']} zeros")
            if tag == "layer90":
                bad = [w for w in inner
                       if by_name[w]["zeros"] != int(np.floor(0.9 * by_name[w]["total"] + 0.5))]
                check(f"{name} every inner layer at 90%", not bad, ", ".join(bad[:3]))
            # The file itself (onnx.numpy_helper) agrees with inspect.
            arr = {t.name: numpy_helper.to_array(t) for t in model.graph.initializer}
            z_np = sum(int((arr[w] == 0).sum()) for w in inner)
            check(f"{name} zeros read back with onnx.numpy_helper", z_np == z, f"{z_np} vs inspect {z}")
        elif tag == "nm24":
            dense_layers = {l["weight"] for l in report["layers"] if l["note"] and "multiple of 4" in l["note"]}
            pat = [w for w in inner if w not in dense_layers]
            bad = [w for w in pat if by_name[w]["pattern"] != "2:4" or by_name[w]["zeros"] * 2 != by_name[w]["total"]]
            check(f"{name} 2:4 on {len(pat)} layers", pat and not bad, ", ".join(bad[:3]))
            for w in dense_layers:
                check(f"{name} {w} left dense and reported", by_name[w]["zeros"] == 0, f"{by_name[w]['zeros']} zeros")
        else:
            check(f"{name} fewer parameters", info["parameters"] < info_dense["parameters"],
                  f"{info['parameters']} vs {info_dense['parameters']}")
            check(f"{name} fewer MACs", info["macs_batch_1"] < info_dense["macs_batch_1"],
                  f"{info['macs_batch_1']} vs {info_dense['macs_batch_1']}")
            check(f"{name} report agrees with inspect",
                  report["totals"]["parameters_after"] == info["parameters"] and
                  report["totals"]["macs_batch_1_after"] == info["macs_batch_1"],
                  f"parameters {report['totals']['parameters_after']} vs {info['parameters']}, "
                  f"MACs {report['totals']['macs_batch_1_after']} vs {info['macs_batch_1']}")
            dense_shapes = {w["name"]: w["shape"] for w in info_dense["weights"]}
            narrowed = [w for w in by_name if w in dense_shapes and by_name[w]["shape"] != dense_shapes[w]]
            check(f"{name} weights narrowed", len(narrowed) > 0, f"{len(narrowed)} tensors")
            rank_changed = [w for w in narrowed if len(by_name[w]["shape"]) != len(dense_shapes[w])]
            check(f"{name} ranks kept", not rank_changed, f"changed: {rank_changed[:3]}")


def main():
    for case in CASES:
        check_case(case)
    bad = [r for r in RESULTS if not r[1]]
    print(f"{len(RESULTS) - len(bad)} passed, {len(bad)} failed")
    for name, _, detail in bad:
        print(f"  failed: {name} {detail}")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
