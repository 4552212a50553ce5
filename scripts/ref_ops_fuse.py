#!/usr/bin/python3
"""Reference values for Conv -> BatchNormalization -> Relu/Clip chains from PyTorch.

Run with Debian's python3 (python3-torch, python3-onnx). For a fixed list of
small chains (odd sizes, strides, groups, depthwise, batch 1, Relu and
Clip(0, 6), a chain whose BatchNormalization output is also a graph output)
it writes into OUT_DIR/<case>/:
  model.onnx      the chain as ONNX nodes (opset 17), parameters as initializers
  x.npy           the input
  dz_<out>.npy    a fixed upstream gradient for each graph output
  want_<out>.npy  PyTorch's value of each graph output
  grad_<name>.npy PyTorch's gradient of L = sum(out * dz_out) over the outputs,
                  for the input ("x") and every initializer
BatchNormalization runs as torch.nn.functional.batch_norm(training=False),
i.e. with the running statistics, except in the bntrain_ cases (training_mode=1:
batch statistics, running statistics as extra outputs in some); all
arithmetic is float64 from float32 inputs. tests/test_ops_fuse.c plans each model with recoup, fused and not.

Usage: ref_ops_fuse.py OUT_DIR
"""
import os
import sys

import numpy as np
import onnx
from onnx import helper, numpy_helper, TensorProto
import torch
import torch.nn.functional as F

EPS = 1e-3  # not the default 1e-5, so that a wrong epsilon shows

# name, N, C, H, W, M, kernel, stride, pad, group, conv bias, act, bn output also a graph output,
# an Add between BatchNormalization and the activation (the chain then ends at BatchNormalization)
CASES = [
    ("bn_relu_odd", 3, 5, 9, 9, 7, 3, 1, 1, 1, False, "relu", False, False),
    ("bn_clip_stride2", 2, 4, 11, 7, 6, 3, 2, 1, 1, True, "clip", False, False),
    ("bn_relu_groups", 2, 6, 8, 10, 9, 3, 1, 1, 3, False, "relu", False, False),
    ("bn_clip_depthwise", 2, 8, 13, 13, 8, 3, 2, 1, 8, False, "clip", False, False),
    ("bn_clip_depthwise_s1", 3, 6, 7, 9, 6, 3, 1, 1, 6, True, "clip", False, False),
    ("bn_relu_1x1_batch1", 1, 16, 20, 20, 12, 1, 1, 0, 1, False, "relu", False, False),
    # 1x1 with a bias on a 7x7 map: the batched matmul's bias-and-epilogue pass
    ("bn_clip_1x1_bias", 3, 17, 7, 7, 33, 1, 1, 0, 1, True, "clip", False, False),
    ("bn_relu_large_map", 2, 3, 24, 24, 5, 3, 1, 1, 1, False, "relu", False, False),
    ("bias_relu", 2, 4, 6, 6, 6, 3, 1, 1, 1, True, "relu", False, False),
    ("bn_only_then_add", 2, 4, 6, 6, 4, 3, 1, 1, 1, False, "relu", False, True),
    ("bn_output_is_graph_output", 2, 4, 9, 9, 6, 3, 1, 1, 1, False, "relu", True, False),
]

# BatchNormalization with batch statistics (training_mode=1), as a training
# run uses it: the normalisation and the activation run as one step. Same
# columns, then the running mean and variance as graph outputs (momentum
# 0.7 in ONNX terms), and the Conv bias's offset: 1e4 gives activations with
# a mean four orders of magnitude above their spread.
TRAIN_CASES = [
    ("bntrain_relu_odd", 3, 5, 9, 9, 7, 3, 1, 1, 1, False, "relu", False, False, True, 0.0),
    ("bntrain_clip_stride2", 2, 4, 11, 7, 5, 3, 2, 1, 1, True, "clip", False, False, False, 0.0),
    ("bntrain_clip_depthwise", 2, 6, 10, 10, 6, 3, 1, 1, 6, False, "clip", False, False, True, 0.0),
    ("bntrain_relu_batch1", 1, 3, 8, 8, 6, 3, 1, 1, 1, False, "relu", False, False, True, 0.0),
    ("bntrain_large_mean", 2, 4, 8, 8, 3, 3, 1, 1, 1, True, "relu", False, False, True, 1e4),
    ("bntrain_output_is_graph_output", 2, 4, 9, 9, 6, 3, 1, 1, 1, False, "relu", True, False, False, 0.0),
]
MOMENTUM = 0.7  # ONNX's: running = running * momentum + batch * (1 - momentum)


def draw(gen, *shape, lo=-1.0, hi=1.0):
    return torch.rand(*shape, generator=gen, dtype=torch.float32) * (hi - lo) + lo


def write_case(out_dir, seed, case):
    name, N, C, H, W, M, k, s, pad, group, has_bias, act, bn_out, add = case[:14]
    train = name.startswith("bntrain_")
    running_out, offset = case[14:] if train else (False, 0.0)
    gen = torch.Generator().manual_seed(seed)
    x = draw(gen, N, C, H, W)
    w = draw(gen, M, C // group, k, k) * 0.5
    params = {"W": w}
    if has_bias:
        params["B"] = draw(gen, M) + offset
    use_bn = name.startswith("bn_") or train
    if use_bn:
        params["scale"] = draw(gen, M, lo=0.5, hi=1.5)
        params["beta"] = draw(gen, M, lo=-0.5, hi=0.5)
        params["mean"] = draw(gen, M, lo=-0.3, hi=0.3)
        params["var"] = draw(gen, M, lo=0.5, hi=2.0)
    if add:
        params["shortcut"] = draw(gen, M)
    # Clip's bounds (0, 6) and a scale on x large enough that both are reached.
    if act == "clip":
        x = x * 4

    leaves = {"x": x.double().requires_grad_(True)}
    for key, t in params.items():
        leaves[key] = t.double().requires_grad_(key not in ("mean", "var", "shortcut"))
    y = F.conv2d(leaves["x"], leaves["W"], leaves.get("B"), stride=s, padding=pad, groups=group)
    outs = {}
    h = y
    if use_bn:
        if train:
            # Batch statistics: the biased variance normalises (PyTorch and
            # ONNX alike). The running update follows ONNX's formula with the
            # biased variance, as recoup does (PyTorch's own running update
            # would use the unbiased one), so it is computed here by hand.
            h = F.batch_norm(y, None, None, leaves["scale"], leaves["beta"], training=True, eps=EPS)
            if running_out:
                yd = y.detach()
                bmean, bvar = yd.mean(dim=(0, 2, 3)), yd.var(dim=(0, 2, 3), unbiased=False)
                running = {"running_mean": params["mean"].double() * MOMENTUM + bmean * (1 - MOMENTUM),
                           "running_var": params["var"].double() * MOMENTUM + bvar * (1 - MOMENTUM)}
        else:
            h = F.batch_norm(y, leaves["mean"], leaves["var"], leaves["scale"], leaves["beta"], training=False,
                             eps=EPS)
        if bn_out:
            outs["bn_out"] = h
        if add:
            h = h + leaves["shortcut"].view(1, M, 1, 1)
    z = torch.relu(h) if act == "relu" else torch.clamp(h, 0.0, 6.0)
    outs["z"] = z
    loss = 0
    dzs = {}
    for key, t in outs.items():
        dzs[key] = draw(gen, *t.shape)
        loss = loss + (t * dzs[key].double()).sum()
    loss.backward()
    if train and running_out:  # no gradient flows from the running statistics
        for key, t in running.items():
            outs[key] = t
            dzs[key] = torch.zeros(t.shape, dtype=torch.float32)

    case_dir = os.path.join(out_dir, name)
    os.makedirs(case_dir, exist_ok=True)
    np.save(os.path.join(case_dir, "x.npy"), x.numpy())
    for key, t in outs.items():
        np.save(os.path.join(case_dir, "want_%s.npy" % key), t.detach().float().numpy())
        np.save(os.path.join(case_dir, "dz_%s.npy" % key), dzs[key].numpy())
    for key, leaf in leaves.items():
        if leaf.grad is not None:
            np.save(os.path.join(case_dir, "grad_%s.npy" % key), leaf.grad.float().numpy())

    nodes = []
    conv_in = ["x", "W"] + (["B"] if has_bias else [])
    nodes.append(helper.make_node("Conv", conv_in, ["y"], name="conv", kernel_shape=[k, k], strides=[s, s],
                                  pads=[pad] * 4, group=group))
    last = "y"
    if use_bn:
        if train:
            nodes.append(helper.make_node("BatchNormalization", ["y", "scale", "beta", "mean", "var"],
                                          ["bn_out"] + (["running_mean", "running_var"] if running_out else []),
                                          name="bn", epsilon=EPS, momentum=MOMENTUM, training_mode=1))
        else:
            nodes.append(helper.make_node("BatchNormalization", ["y", "scale", "beta", "mean", "var"], ["bn_out"],
                                          name="bn", epsilon=EPS))
        last = "bn_out"
        if add:
            nodes.append(helper.make_node("Add", ["bn_out", "shortcut"], ["sum"], name="add"))
            last = "sum"
    if act == "relu":
        nodes.append(helper.make_node("Relu", [last], ["z"], name="act"))
    else:
        nodes.append(helper.make_node("Clip", [last, "lo", "hi"], ["z"], name="act"))
    inits = [numpy_helper.from_array(t.numpy(), key) for key, t in params.items()]
    if add:
        inits[-1] = numpy_helper.from_array(params["shortcut"].view(1, M, 1, 1).numpy(), "shortcut")
    if act == "clip":
        inits += [numpy_helper.from_array(np.array(0.0, np.float32), "lo"),
                  numpy_helper.from_array(np.array(6.0, np.float32), "hi")]
    outputs = [helper.make_tensor_value_info(key, TensorProto.FLOAT, list(t.shape)) for key, t in outs.items()]
    graph = helper.make_graph(nodes, name, [helper.make_tensor_value_info("x", TensorProto.FLOAT, [N, C, H, W])],
                              outputs, inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    onnx.save(model, os.path.join(case_dir, "model.onnx"))
    return name


def main():
    if len(sys.argv) != 2:
        sys.exit(__doc__)
    out_dir = sys.argv[1]
    os.makedirs(out_dir, exist_ok=True)
    names = [write_case(out_dir, 100 + i, c) for i, c in enumerate(CASES + TRAIN_CASES)]
    tmp = os.path.join(out_dir, "cases.txt.tmp")
    with open(tmp, "w") as f:
        f.write("\n".join(names) + "\n")
    os.replace(tmp, os.path.join(out_dir, "cases.txt"))
    print("%d chains written to %s" % (len(names), out_dir))


if __name__ == "__main__":
    main()
