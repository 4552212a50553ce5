#!/usr/bin/python3
"""Pairing of teacher and student tensors (`recoup inspect --pairs`) on the
reference models exported from PyTorch (scripts/export_reference_models.py).

- A model against its own export at another opset: every layer output
  (Conv, ConvTranspose, Gemm, MatMul, residual Add) pairs with the tensor of
  the same name, identical shapes, no projector. The expected set is counted
  here independently, from the graph read with Debian's python3-onnx.
- A model against its channel-pruned copy (`recoup prune --channels 0.5`):
  pairs keep spatial sizes, and narrower layers are marked for a projector.
- Explicit pairs with unknown names or incompatible shapes are refused with
  one clear error.

Usage: pairing_test.py RECOUP REFERENCE_DIR WORK_DIR
"""

import json
import os
import subprocess
import sys

import onnx

from e2e import Run

RECOUP, REF, WORK = sys.argv[1:4]
os.makedirs(WORK, exist_ok=True)
run = Run(RECOUP)
LAYERS = {"Conv", "ConvTranspose", "Gemm", "MatMul"}


def expected_layer_outputs(path):
    """Outputs of layer nodes, and of Adds whose two inputs are both node outputs."""
    g = onnx.load(path).graph
    produced = {o for n in g.node for o in n.output}
    inits = {t.name for t in g.initializer}
    names = set()
    for n in g.node:
        if n.op_type in LAYERS:
            names.add(n.output[0])
        elif n.op_type == "Add" and all(i in produced and i not in inits for i in n.input):
            names.add(n.output[0])
    return names


for model in ("resnet8", "mobilenet_v2", "kws_cnn1d", "conv_autoencoder"):
    a = os.path.join(REF, f"{model}_op13_bn", "model.onnx")
    b = os.path.join(REF, f"{model}_op17_bn", "model.onnx")
    if not os.path.exists(a):
        raise SystemExit(f"missing {a}: the reference_models fixture did not run")
    pairs = run.json(["inspect", "--pairs", a, b, "--json"])
    got = {p["student"] for p in pairs}
    want = expected_layer_outputs(b)
    same = all(p["teacher"] == p["student"] and p["teacher_shape"] == p["student_shape"] and not p["projector"]
               and p["matched_by"] == "name" for p in pairs)
    run.check(f"{model}: every layer output paired by name, equal shapes, no projector",
              same and got == want, f"({len(got)} pairs, {len(want)} expected)")

dense = os.path.join(REF, "resnet8_op13_bn", "model.onnx")
narrow = os.path.join(WORK, "resnet8_half.onnx")
run(["prune", dense, "--channels", "0.5", "--out", narrow])
pairs = run.json(["inspect", "--pairs", dense, narrow, "--json"])
spatial_ok = all(p["teacher_shape"][2:] == p["student_shape"][2:] for p in pairs)
run.check("channel-pruned student: spatial sizes agree, narrower layers need a projector",
          spatial_ok and any(p["projector"] for p in pairs), f"({sum(p['projector'] for p in pairs)} of {len(pairs)})")

for name, spec, needle in (
        ("unknown teacher tensor", "no_such_tensor=/stem/stem.0/Conv_output_0", "no_such_tensor"),
        ("unknown student tensor", "/stem/stem.0/Conv_output_0=missing_one", "missing_one"),
        ("incompatible shapes", "/stem/stem.0/Conv_output_0=/blocks/blocks.2/conv1/Conv_output_0", "not compatible"),
        ("malformed pair", "just_one_name", "TEACHER_TENSOR=STUDENT_TENSOR")):
    r = subprocess.run([RECOUP, "inspect", "--pairs", dense, narrow, "--pair", spec], capture_output=True, text=True)
    lines = [l for l in r.stderr.splitlines() if l.strip()]
    run.check(f"--pair refused: {name}", r.returncode == 1 and len(lines) == 1 and needle in r.stderr,
              r.stderr.strip())
run.finish()
