"""Small ONNX models for the command-line tests, built with the onnx package
(Debian python3-onnx); the ONNX checker accepts each fully declared one."""

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper


def mlp(path, names=None, sizes=(6, 8, 4), batch="N", out_type="full", zero_fraction=0.0):
    """x (N, sizes[0]) -> Gemm -> Relu -> ... -> logits. `names` renames
    values and nodes; out_type "full" declares dtype and shape, "dtype" only
    the dtype, "none" no type at all; zero_fraction zeros that share of the
    first weight, smallest |w| first (a pruned student)."""
    n = dict(x="x", logits="logits")
    n.update(names or {})
    rng = np.random.RandomState(0)
    inits, nodes, cur = [], [], n["x"]
    for i in range(len(sizes) - 1):
        wname, bname = f"w{i}", f"b{i}"
        wt = rng.randn(sizes[i + 1], sizes[i]).astype(np.float32)
        if i == 0 and zero_fraction:
            wt[np.abs(wt) < np.quantile(np.abs(wt), zero_fraction)] = 0
        inits += [numpy_helper.from_array(wt, wname),
                  numpy_helper.from_array(np.zeros(sizes[i + 1], np.float32), bname)]
        last = i == len(sizes) - 2
        out = n["logits"] if last else n.get(f"h{i}", f"h{i}")
        nodes.append(helper.make_node("Gemm", [cur, wname, bname], [out], transB=1, name=n.get(f"fc{i}", f"fc{i}")))
        if not last:
            nodes.append(helper.make_node("Relu", [out], [out + "_relu"], name=f"act{i}"))
            cur = out + "_relu"
    if out_type == "full":
        out_vi = helper.make_tensor_value_info(n["logits"], TensorProto.FLOAT, [batch, sizes[-1]])
    elif out_type == "dtype":
        out_vi = helper.make_tensor_value_info(n["logits"], TensorProto.FLOAT, None)
    else:
        out_vi = helper.make_empty_tensor_value_info(n["logits"])
    g = helper.make_graph(nodes, "mlp", [helper.make_tensor_value_info(n["x"], TensorProto.FLOAT, [batch, sizes[0]])],
                          [out_vi], inits)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 13)])
    m.ir_version = 8
    if out_type == "full":  # onnx 1.12's checker wants a shape on graph outputs; some exporters write none
        onnx.checker.check_model(m)
    onnx.save(m, path)
    return path
