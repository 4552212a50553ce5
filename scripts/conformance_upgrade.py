#!/usr/bin/python3
"""Upgrade ONNX's PyTorch-made backend test models to a newer opset.

The pytorch-converted and pytorch-operator cases of Debian's libonnx-testdata
are opset 6 files, and some node cases (ops unchanged for long, such as
GlobalAveragePool or InstanceNormalization) are opset 1 to 8: older than
recoup reads (9 and up). ONNX's own version converter (onnx.version_converter,
from Debian's python3-onnx) rewrites each such model for opset 13; the
expected outputs stay those shipped with the data, so test_conformance runs
these graphs as well. Node cases at opset 9 or later are left out (they run
as shipped).

Usage: conformance_upgrade.py DATA_ROOT OUT_DIR
Writes OUT_DIR/<suite>/<case>/model.onnx with links to the case's
test_data_set_* folders, or OUT_DIR/<suite>/<case>/NOT_CONVERTED holding the
converter's error when it cannot upgrade a model.
"""
import os
import shutil
import sys

import onnx
from onnx import numpy_helper, shape_inference, version_converter

TARGET_OPSET = 13
SUITES = ("node", "pytorch-converted", "pytorch-operator")
MIN_READ_OPSET = 9  # the oldest default-domain opset recoup reads


def default_opset(model):
    return max((o.version for o in model.opset_import if o.domain in ("", "ai.onnx")), default=0)


def per_channel_prelu_slopes(model):
    """PRelu-6 applies a slope of C values per channel (axis 1); PRelu-7 and
    later broadcast the slope numpy-style from the right (ONNX operator spec,
    PRelu versions 6 and 7). The converter keeps a (C) slope, which under the
    new rule pairs with the last axis; reshape such initializers to
    (C, 1, ..., 1) so the upgraded model means what the old one did."""
    inferred = shape_inference.infer_shapes(model)
    ranks = {}
    for vi in list(inferred.graph.input) + list(inferred.graph.value_info):
        if vi.type.tensor_type.HasField("shape"):
            ranks[vi.name] = len(vi.type.tensor_type.shape.dim)
    inits = {t.name: t for t in model.graph.initializer}
    for node in model.graph.node:
        if node.op_type != "PRelu" or len(node.input) < 2:
            continue
        rank = ranks.get(node.input[0], 0)
        slope = inits.get(node.input[1])
        if slope is None or rank <= 2 or len(slope.dims) != 1 or slope.dims[0] == 1:
            continue
        value = numpy_helper.to_array(slope).reshape([slope.dims[0]] + [1] * (rank - 2))
        slope.CopyFrom(numpy_helper.from_array(value, slope.name))
        for vi in model.graph.input:  # IR 3 files list initializers as inputs too
            if vi.name == slope.name:
                shape = vi.type.tensor_type.shape
                del shape.dim[:]
                for d in value.shape:
                    shape.dim.add().dim_value = d


def upgrade_case(src, dst, model):
    os.makedirs(dst, exist_ok=True)
    try:
        upgraded = version_converter.convert_version(model, TARGET_OPSET)
    except Exception as err:  # the converter raises plain RuntimeErrors
        with open(os.path.join(dst, "NOT_CONVERTED"), "w") as f:
            f.write(f"onnx.version_converter to opset {TARGET_OPSET}: {err}\n")
        return False
    if default_opset(model) < 7:
        per_channel_prelu_slopes(upgraded)
    onnx.save(upgraded, os.path.join(dst, "model.onnx"))
    for name in sorted(os.listdir(src)):
        if name.startswith("test_data_set_"):
            os.symlink(os.path.join(src, name), os.path.join(dst, name))
    return True


def main():
    if len(sys.argv) != 3:
        sys.exit(__doc__)
    root, out = sys.argv[1], sys.argv[2]
    if os.path.exists(out):
        shutil.rmtree(out)
    for suite in SUITES:
        src_suite = os.path.join(root, suite)
        if not os.path.isdir(src_suite):
            sys.exit(f"{src_suite}: missing (install Debian's libonnx-testdata)")
        done = failed = 0
        for case in sorted(os.listdir(src_suite)):
            src = os.path.join(src_suite, case)
            if not os.path.isfile(os.path.join(src, "model.onnx")):
                continue
            model = onnx.load(os.path.join(src, "model.onnx"))
            opset = default_opset(model)
            if suite == "node" and (opset == 0 or opset >= MIN_READ_OPSET):
                continue
            if upgrade_case(src, os.path.join(out, suite, case), model):
                done += 1
            else:
                failed += 1
        print(f"{suite}: {done} models upgraded to opset {TARGET_OPSET}, {failed} not convertible")


if __name__ == "__main__":
    main()
