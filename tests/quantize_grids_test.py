#!/usr/bin/python3
"""What `recoup quantize` writes into a model, on small graphs built with the
onnx package, and what `recoup prune` does with a quantized model.

- Names: every tensor and node name quantize adds is read back with the onnx
  package (Debian python3-onnx) and follows recoup's own scheme (T.grid,
  T.grid_step, T.grid_zero, T.on_grid, T.pre_grid, nodes T.to_grid and
  T.from_grid, one numeric suffix for a whole set when a name is taken); none
  ends in _quantized, _scale or _zero_point or contains _dequantized, and all
  stay unique when the input model already uses the new names. The files pass
  onnx.checker with full shape inference.
- Output margin: QuantizeLinear computes saturate(round(x / scale) + zero
  point) and DequantizeLinear (q - zero point) * scale, rounding half to even
  (ONNX operator specification). Simulated in NumPy with the scales read from
  the file, and run by onnxruntime-web (npm, tests/ort/run.mjs), an output
  7.5% beyond the calibrated maximum is kept within a step with the default
  margin (0.1) and clipped with --output-margin 0; the input grid keeps its
  calibrated range exactly (the margin is for output grids only).
- prune refuses a quantized (QDQ) model with one line naming the file and
  saying to prune the float model first, and writes nothing.

Usage: quantize_grids_test.py RECOUP_BINARY WORK_DIR
"""

import os
import re
import subprocess
import sys

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from e2e import Run, run_ort

RECOUP, WORK = sys.argv[1:3]
run = Run(RECOUP)
check = run.check

# The scheme quantize.c documents (grid_names): base, a part, an optional set suffix.
SCHEME = re.compile(r"^(?P<base>.+)\.(?P<part>grid|grid_step|grid_zero|on_grid|pre_grid|to_grid|from_grid|folded)"
                    r"(?P<k>_\d+)?$")


def foreign(name):
    """Suffixes a practitioner would take for another program's output (issue 16)."""
    return (name.endswith("_quantized") or name.endswith("_scale") or name.endswith("_zero_point")
            or "_dequantized" in name)


def save(graph, path, opset=13):
    m = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    m.ir_version = 8
    onnx.checker.check_model(m)
    onnx.save(m, path)
    return m


def all_names(m):
    """(tensor names, node names) of a model."""
    g = m.graph
    tensors = {i.name for i in g.input} | {o.name for o in g.output} | {t.name for t in g.initializer}
    for n in g.node:
        tensors |= set(n.input) | set(n.output)
    tensors.discard("")
    return tensors, [n.name for n in g.node]


def check_written_names(label, before, after_path):
    """Naming rules on the names `after` has and `before` had not."""
    after = onnx.load(after_path)
    run.checker_accepts(label, after)
    t0, n0 = all_names(before)
    t1, n1 = all_names(after)
    # The protobuf reader hands back bytes for a string that is not valid UTF-8.
    raw = [n for n in t1 | set(n1) if not isinstance(n, str)]
    check(f"{label}: every name is valid UTF-8", not raw, str(raw[:3]))
    t1, n1 = {n for n in t1 if isinstance(n, str)}, [n for n in n1 if isinstance(n, str)]
    new = sorted((t1 - t0) | (set(n1) - set(n0)))
    check(f"{label}: quantize added names", len(new) > 0, str(len(new)))
    bad = [n for n in new if foreign(n)]
    check(f"{label}: no new name ends in _quantized/_scale/_zero_point or contains _dequantized", not bad,
          str(bad))
    off_scheme = [n for n in new if not SCHEME.match(n)]
    check(f"{label}: every new name follows T.grid / T.grid_step / T.grid_zero / T.on_grid / T.pre_grid / "
          f"T.to_grid / T.from_grid", not off_scheme, str(off_scheme))
    g = after.graph
    dup_nodes = sorted({n for n in n1 if n and n1.count(n) > 1})
    check(f"{label}: node names unique", not dup_nodes, str(dup_nodes))
    inits = [t.name for t in g.initializer]
    produced = inits + [i.name for i in g.input] + [o for n in g.node for o in n.output if o]
    dup_tensors = sorted({n for n in produced if produced.count(n) > 1})
    check(f"{label}: every tensor made once (initializer, input or one node output)", not dup_tensors,
          str(dup_tensors))
    clash = sorted(set(n for n in n1 if n) & (t1 - t0))
    check(f"{label}: new tensor names differ from node names", not clash, str(clash))
    # One set, one suffix: names of the same grid share their numeric suffix.
    sets = {}
    for n in new:
        mt = SCHEME.match(n)
        if mt and mt.group("part") != "folded":
            sets.setdefault(mt.group("base"), set()).add(mt.group("k") or "")
    mixed = {b: sorted(k) for b, k in sets.items() if len(k) > 1}
    check(f"{label}: the names of one grid share one suffix", not mixed, str(mixed))
    return after, new, sets


def conv_bn_model(path):
    """x (N,2,5,5) -> Conv (no bias) -> BatchNormalization -> Relu -> Flatten -> Gemm -> y (N,3)."""
    rng = np.random.default_rng(3)
    inits = [numpy_helper.from_array(rng.normal(0, 0.5, (4, 2, 3, 3)).astype(np.float32), "conv.w"),
             numpy_helper.from_array(rng.uniform(0.5, 1.5, 4).astype(np.float32), "bn.gamma"),
             numpy_helper.from_array(rng.normal(0, 0.2, 4).astype(np.float32), "bn.beta"),
             numpy_helper.from_array(rng.normal(0, 0.2, 4).astype(np.float32), "bn.mean"),
             numpy_helper.from_array(rng.uniform(0.5, 1.5, 4).astype(np.float32), "bn.var"),
             numpy_helper.from_array(rng.normal(0, 0.3, (3, 36)).astype(np.float32), "fc.w"),
             numpy_helper.from_array(rng.normal(0, 0.1, 3).astype(np.float32), "fc.b")]
    nodes = [helper.make_node("Conv", ["x", "conv.w"], ["c"], "conv", kernel_shape=[3, 3]),
             helper.make_node("BatchNormalization", ["c", "bn.gamma", "bn.beta", "bn.mean", "bn.var"], ["b"], "bn"),
             helper.make_node("Relu", ["b"], ["r"], "relu"),
             helper.make_node("Flatten", ["r"], ["f"], "flatten", axis=1),
             helper.make_node("Gemm", ["f", "fc.w", "fc.b"], ["y"], "fc", transB=1)]
    g = helper.make_graph(nodes, "conv_bn", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 2, 5, 5])],
                          [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 3])], inits)
    return save(g, path)


def taken_names_model(path):
    """A model that already uses names of the scheme, so every set needs a suffix:
    x -> Mul(x, 'W.grid') [node 'h.to_grid'] -> Add(., 'y.grid_step') [node 'W.from_grid_1'] -> h
    -> MatMul(h, W) -> y."""
    inits = [numpy_helper.from_array(np.array(1.0, np.float32), "W.grid"),
             numpy_helper.from_array(np.array([0.25, -0.5], np.float32), "y.grid_step"),
             numpy_helper.from_array(np.array([[1.0, 0.5], [1.0, -0.5]], np.float32), "W")]
    nodes = [helper.make_node("Mul", ["x", "W.grid"], ["h1"], "h.to_grid"),
             helper.make_node("Add", ["h1", "y.grid_step"], ["h"], "W.from_grid_1"),
             helper.make_node("MatMul", ["h", "W"], ["y"], "mm")]
    g = helper.make_graph(nodes, "taken", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 2])],
                          [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 2])], inits)
    return save(g, path)


def names():
    x = os.path.join(WORK, "conv_x.npy")
    np.save(x, np.random.default_rng(5).normal(0, 1, (32, 2, 5, 5)).astype(np.float32))
    src = os.path.join(WORK, "conv_bn.onnx")
    before = conv_bn_model(src)
    for label, extra in (("conv+bn w8a8", []), ("conv+bn weights only", ["--activation-bits", "none"])):
        out = os.path.join(WORK, f"conv_bn_{len(extra)}.onnx")
        run(["quantize", src, "--data", x, "--out", out] + extra)
        after, new, _ = check_written_names(label, before, out)
        want = {"conv.w.grid", "conv.w.grid_step", "conv.w.on_grid", "conv.w.from_grid", "fc.w.grid"}
        want |= {"conv.w.bias.grid", "fc.b.grid", "x.grid", "x.to_grid", "y.pre_grid"} if not extra \
            else {"conv.w.bias.folded"}
        check(f"{label}: the expected names are there", want <= set(new), str(sorted(want - set(new))))

    pts = os.path.join(WORK, "taken_x.npy")
    np.save(pts, np.random.default_rng(6).uniform(-1, 1, (40, 2)).astype(np.float32))
    src = os.path.join(WORK, "taken.onnx")
    before = taken_names_model(src)
    out = os.path.join(WORK, "taken_q.onnx")
    run(["quantize", src, "--data", pts, "--out", out])
    after, new, sets = check_written_names("names already taken", before, out)
    check("names already taken: W's set moved to suffix _2 (W.grid and W.from_grid_1 are taken)",
          sets.get("W") == {"_2"} and "W.grid_2" in new and "W.from_grid_2" in new, str(sets.get("W")))
    check("names already taken: h's set moved to suffix _1 (node h.to_grid exists)",
          sets.get("h") == {"_1"} and "h.to_grid_1" in new, str(sets.get("h")))
    check("names already taken: y's set moved to suffix _1 (y.grid_step exists)",
          sets.get("y") == {"_1"} and "y.pre_grid_1" in new and "y.grid_step_1" in new, str(sets.get("y")))
    g = after.graph
    kept = {t.name: numpy_helper.to_array(t) for t in g.initializer}
    ops = {n.name: n.op_type for n in g.node}
    check("names already taken: the model's own W.grid and y.grid_step are still its float values",
          kept.get("W.grid") is not None and kept["W.grid"].dtype == np.float32 and float(kept["W.grid"]) == 1.0
          and kept.get("y.grid_step") is not None and kept["y.grid_step"].tolist() == [0.25, -0.5])
    check("names already taken: nodes h.to_grid and W.from_grid_1 are still the Mul and the Add",
          ops.get("h.to_grid") == "Mul" and ops.get("W.from_grid_1") == "Add", str(ops))
    check("names already taken: the output keeps its name y",
          [o.name for o in g.output] == ["y"], str([o.name for o in g.output]))
    long_names(pts)
    return out, pts


def long_names(pts):
    """A 601-byte weight name, "a" then two-byte characters: derived names keep at most 400 bytes of
    it, cut at a character boundary (399 here), so the file still holds valid UTF-8 (protobuf strings
    must)."""
    wname = "a" + "\u00e9" * 300
    g = helper.make_graph([helper.make_node("MatMul", ["x", wname], ["y"], "mm")], "long",
                          [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 2])],
                          [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 2])],
                          [numpy_helper.from_array(np.eye(2, dtype=np.float32), wname)])
    src = os.path.join(WORK, "long.onnx")
    before = save(g, src)
    out = os.path.join(WORK, "long_q.onnx")
    run(["quantize", src, "--data", pts, "--out", out])
    _, new, _ = check_written_names("601-byte weight name", before, out)
    grid = [n for n in new if n.endswith(".grid") and n.startswith("a\u00e9")]
    check("601-byte weight name: its grid is named after its first 399 bytes (200 characters)",
          grid == ["a" + "\u00e9" * 199 + ".grid"], str([len(n.encode()) for n in grid]))


def qdq(x, scale, zero):
    """QuantizeLinear then DequantizeLinear to uint8, as the ONNX operator specification defines them."""
    q = np.clip(np.rint(x / np.float32(scale)) + zero, 0, 255)  # np.rint rounds half to even
    return ((q - zero) * np.float32(scale)).astype(np.float32)


def pair_grid(m, tensor):
    """(scale, zero point) of the activation pair on `tensor`, read with the onnx package: the
    QuantizeLinear reading it, or for a graph output the one feeding the DequantizeLinear that
    now produces it."""
    inits = {t.name: numpy_helper.to_array(t) for t in m.graph.initializer}
    made_by = {o: n for n in m.graph.node for o in n.output}
    dq = made_by.get(tensor)
    q = made_by.get(dq.input[0]) if dq is not None and dq.op_type == "DequantizeLinear" else None
    if q is None or q.op_type != "QuantizeLinear":
        q = next((n for n in m.graph.node if n.op_type == "QuantizeLinear" and n.input[0] == tensor), None)
    if q is None:
        return 0.0, 0
    return float(inits[q.input[1]]), int(inits[q.input[2]])


def margin():
    """y = x @ W with W = [[1, .5], [1, -.5]]: inputs in [-2, 2] on both axes, but the calibration
    samples keep |a + b| <= 2, so y's calibrated range is [-2, 2] while the probe's a + b = 2.15
    stays inside the input grid."""
    w = np.array([[1.0, 0.5], [1.0, -0.5]], np.float32)
    g = helper.make_graph([helper.make_node("MatMul", ["x", "W"], ["y"], "mm")], "tight",
                          [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 2])],
                          [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 2])],
                          [numpy_helper.from_array(w, "W")])
    src = os.path.join(WORK, "tight.onnx")
    save(g, src)
    a = np.linspace(-2, 2, 41, dtype=np.float32)
    cal = np.array([(p, q) for p in a for q in a if abs(p + q) <= 2.0 + 1e-6], np.float32)
    calib = os.path.join(WORK, "tight_calib.npy")
    np.save(calib, cal)
    y_cal = cal @ w
    probe = np.array([[1.075, 1.075], [-1.0, -1.0], [0.5, 0.25]], np.float32)
    probe_path = os.path.join(WORK, "tight_probe.npy")
    np.save(probe_path, probe)
    y_float = probe @ w
    print(f"calibrated y range [{y_cal.min():.4g}, {y_cal.max():.4g}], probe y0 {y_float[0, 0]:.4g} "
          f"({100 * (y_float[0, 0] / y_cal.max() - 1):.1f}% beyond the max)")
    errs = {}
    for label, extra in (("default margin", []), ("--output-margin 0", ["--output-margin", "0"])):
        out = os.path.join(WORK, f"tight_{len(extra)}.onnx")
        rep = run.json(["quantize", src, "--data", calib, "--out", out, "--calibration", "minmax", "--json"] + extra)
        m = onnx.load(out)
        (sx, zx), (sy, zy) = pair_grid(m, "x"), pair_grid(m, "y")
        want_margin = 0.1 if not extra else 0.0
        check(f"{label}: summary states output_margin {want_margin}", rep.get("output_margin") == want_margin,
              str(rep.get("output_margin")))
        by_tensor = {gr["tensor"]: gr for gr in rep["activation_grids"]}
        my, mx = by_tensor.get("y", {}).get("margin"), by_tensor.get("x", {}).get("margin")
        check(f"{label}: y's grid reports margin {want_margin}, x's 0",
              my is not None and abs(my - want_margin) < 1e-7 and mx == 0, f"y {my}, x {mx}")
        # x's grid is exactly the calibrated [-2, 2] (asymmetric uint8 over min..max: common practice).
        check(f"{label}: the input grid keeps the calibrated range (scale 4/255)",
              abs(sx - 4.0 / 255) < 1e-7, f"scale {sx:.9g}, want {4 / 255:.9g}")
        span = (y_cal.max() - y_cal.min()) * (1 + want_margin)
        check(f"{label}: the output grid spans {1 + want_margin:g} x the calibrated range",
              abs(sy * 255 - span) < 1e-4 * span, f"255 * scale {sy * 255:.6g}, want {span:.6g}")
        # The file's semantics in NumPy: input pair, integer-exact weights, output pair.
        sw = np.abs(w).max(axis=0) / 127
        w_dq = (np.clip(np.rint(w / sw), -127, 127) * sw).astype(np.float32)
        ref = qdq(qdq(probe, sx, zx) @ w_dq, sy, zy)
        ort = run_ort(out, probe_path, os.path.join(WORK, f"tight_ort_{len(extra)}"))
        d = float(np.abs(ort - ref).max())
        check(f"{label}: onnxruntime-web equals the operator specification's QDQ in NumPy within one output step",
              d <= sy * 1.001, f"max |diff| {d:.3g}, step {sy:.3g}")
        mine = os.path.join(WORK, f"tight_mine_{len(extra)}.npy")
        run(["eval", out, "--data", probe_path, "--out", mine])
        d = float(np.abs(np.load(mine) - ort).max())
        check(f"{label}: recoup eval equals onnxruntime-web within one output step", d <= sy * 1.001,
              f"max |diff| {d:.3g}")
        errs[label] = (float(abs(ort[0, 0] - y_float[0, 0])), sy, float(ort[0, 0]))
    e, step, got = errs["default margin"]
    check("default margin: the output 7.5% beyond the calibrated max is not clipped (error within 1.5 steps)",
          e <= 1.5 * step, f"float {y_float[0, 0]:.4g}, quantized {got:.4g}, step {step:.3g}")
    e0, step0, got0 = errs["--output-margin 0"]
    check("--output-margin 0: the same output is clipped at the calibrated max (the test can fail)",
          e0 > 5 * step0 and abs(got0 - y_cal.max()) <= step0, f"quantized {got0:.4g}, step {step0:.3g}")
    r = subprocess.run([RECOUP, "quantize", src, "--data", calib, "--out", os.path.join(WORK, "never.onnx"),
                        "--output-margin", "-1"], capture_output=True, text=True)
    check("--output-margin -1 is a usage error", r.returncode == 2 and "--output-margin" in r.stderr,
          r.stderr.strip())


def prune_refusal(quantized):
    out = os.path.join(WORK, "pruned_q.onnx")
    if os.path.exists(out):
        os.remove(out)
    for args in (["--sparsity", "0.5"], ["--pattern", "2:4"], ["--channels", "0.5"]):
        r = subprocess.run([RECOUP, "prune", quantized, "--out", out] + args, capture_output=True, text=True)
        lines = r.stderr.strip().splitlines()
        check(f"prune {' '.join(args)} on a QDQ model: exit 1, one line naming the file, saying what to do",
              r.returncode == 1 and len(lines) == 1 and quantized in r.stderr and "prune the float model" in r.stderr
              and "quantize" in r.stderr, f"exit {r.returncode}: {r.stderr.strip()}")
        check(f"prune {' '.join(args)} on a QDQ model: nothing written", not os.path.exists(out))


def main():
    os.makedirs(WORK, exist_ok=True)
    quantized, _ = names()
    prune_refusal(quantized)
    margin()
    run.finish()


if __name__ == "__main__":
    main()
