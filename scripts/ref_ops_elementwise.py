#!/usr/bin/python3
"""Reference outputs and gradients from PyTorch for the pointwise, softmax
and normalisation kernels (tests/test_ops_elementwise_ref.c reads them).

Run with Debian's python3 (python3-torch). Usage: ref_ops_elementwise.py OUTDIR

Writes OUTDIR/ops_elementwise_ref.bin (raw little-endian float32, tensors one
after another) and OUTDIR/ops_elementwise_ref.txt, one line per tensor:
    <case>/<name> <offset in floats> <rank> <dim0> <dim1> ...
Each case stores its inputs, the upstream gradient `gy`, the forward output
`y` and the autograd gradient `d<input>` of sum(y * gy) for every input that
takes one. Seeds are fixed so that runs are reproducible.
"""
import os
import sys

import torch
import torch.nn.functional as F


class Writer:
    def __init__(self, outdir):
        os.makedirs(outdir, exist_ok=True)
        self.bin_path = os.path.join(outdir, "ops_elementwise_ref.bin")
        self.txt_path = os.path.join(outdir, "ops_elementwise_ref.txt")
        self.chunks = []
        self.lines = []
        self.offset = 0

    def put(self, key, t):
        a = t.detach().to(torch.float32).contiguous().numpy().astype("<f4")
        self.chunks.append(a.tobytes())
        dims = " ".join(str(d) for d in a.shape)
        self.lines.append(f"{key} {self.offset} {a.ndim} {dims}".rstrip())
        self.offset += a.size

    def close(self):
        # Write to temporary names and rename, so a reader never sees half a file.
        with open(self.bin_path + ".tmp", "wb") as f:
            for c in self.chunks:
                f.write(c)
        with open(self.txt_path + ".tmp", "w") as f:
            f.write("\n".join(self.lines) + "\n")
        os.replace(self.bin_path + ".tmp", self.bin_path)
        os.replace(self.txt_path + ".tmp", self.txt_path)


def case(w, name, fn, inputs, grads):
    """inputs: dict name -> tensor; grads: names of inputs to differentiate."""
    leaf = {}
    for k, v in inputs.items():
        v = v.detach().clone()
        if k in grads:
            v.requires_grad_(True)
        leaf[k] = v
        w.put(f"{name}/{k}", v)
    y = fn(*leaf.values())
    gy = torch.randn(y.shape)
    y.backward(gy)
    w.put(f"{name}/gy", gy)
    w.put(f"{name}/y", y)
    for k in grads:
        w.put(f"{name}/d{k}", leaf[k].grad)


def away_from_zero(t, margin=0.1):
    return t + margin * torch.sign(t)


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: ref_ops_elementwise.py OUTDIR")
    torch.manual_seed(20240611)
    torch.set_num_threads(1)
    w = Writer(sys.argv[1])

    # Activations (ONNX op, torch function).
    x = torch.randn(3, 5) * 2
    case(w, "gelu_none", lambda x: F.gelu(x), {"x": x}, ["x"])
    case(w, "gelu_tanh", lambda x: F.gelu(x, approximate="tanh"), {"x": x}, ["x"])
    case(w, "hardswish", lambda x: F.hardswish(x), {"x": away_from_zero(torch.randn(4, 6) * 2.5)}, ["x"])
    case(w, "hardsigmoid", lambda x: F.hardsigmoid(x), {"x": torch.randn(4, 6) * 2}, ["x"])
    case(w, "sigmoid", torch.sigmoid, {"x": torch.randn(4, 6) * 3}, ["x"])
    case(w, "tanh", torch.tanh, {"x": torch.randn(4, 6) * 2}, ["x"])
    case(w, "softplus", lambda x: F.softplus(x), {"x": torch.randn(4, 6) * 3}, ["x"])
    case(w, "elu", lambda x: F.elu(x, alpha=1.3), {"x": torch.randn(4, 6)}, ["x"])
    case(w, "leaky_relu", lambda x: F.leaky_relu(x, 0.05), {"x": away_from_zero(torch.randn(4, 6))}, ["x"])
    case(w, "relu", F.relu, {"x": away_from_zero(torch.randn(4, 6))}, ["x"])
    case(w, "prelu", lambda x, slope: F.prelu(x, slope),
         {"x": away_from_zero(torch.randn(2, 3, 4, 4)), "slope": torch.tensor([0.1, -0.3, 0.6])}, ["x", "slope"])
    case(w, "clamp", lambda x: torch.clamp(x, min=-0.5, max=0.7), {"x": torch.randn(5, 6) * 2}, ["x"])

    # Unary math.
    pos = torch.rand(4, 5) + 0.2
    case(w, "sqrt", torch.sqrt, {"x": pos}, ["x"])
    case(w, "log", torch.log, {"x": pos}, ["x"])
    case(w, "exp", torch.exp, {"x": torch.randn(4, 5)}, ["x"])
    case(w, "erf", torch.erf, {"x": torch.randn(4, 5)}, ["x"])
    case(w, "reciprocal", torch.reciprocal, {"x": pos}, ["x"])
    case(w, "abs", torch.abs, {"x": away_from_zero(torch.randn(4, 5))}, ["x"])

    # Broadcasting binary ops and Pow.
    case(w, "add_bias", lambda a, b: a + b, {"a": torch.randn(2, 3, 4, 5), "b": torch.randn(1, 3, 1, 1)}, ["a", "b"])
    case(w, "mul_bcast", lambda a, b: a * b, {"a": torch.randn(2, 1, 4), "b": torch.randn(3, 1)}, ["a", "b"])
    case(w, "sub_scalar", lambda a, b: a - b, {"a": torch.randn(()), "b": torch.randn(3, 4)}, ["a", "b"])
    case(w, "div_row", lambda a, b: a / b, {"a": torch.randn(4, 5), "b": torch.rand(5) + 0.5}, ["a", "b"])
    case(w, "pow", lambda a, b: torch.pow(a, b), {"a": torch.rand(3, 4) + 0.3, "b": torch.randn(4)}, ["a", "b"])
    case(w, "where", lambda c, a, b: torch.where(c > 0.5, a, b),
         {"c": torch.tensor([[1.0], [0.0], [1.0]]), "a": torch.randn(1, 4), "b": torch.randn(3, 4)}, ["a", "b"])

    # Softmax family: opset 13 single axis and the pre-13 2-D coercion at axis 1.
    case(w, "softmax_last", lambda x: F.softmax(x, dim=-1), {"x": torch.randn(4, 7) * 3}, ["x"])
    case(w, "log_softmax_axis1", lambda x: F.log_softmax(x, dim=1), {"x": torch.randn(3, 4, 5) * 3}, ["x"])
    case(w, "softmax_coerced", lambda x: F.softmax(x.reshape(3, 20), dim=1).reshape(3, 4, 5),
         {"x": torch.randn(3, 4, 5) * 3}, ["x"])

    # Normalisation. ONNX momentum m weighs the old running value, torch's the
    # new batch value: torch momentum = 1 - m.
    xb = torch.randn(4, 3, 5, 5) * 2 + 0.5
    gamma, beta = torch.randn(3), torch.randn(3)
    rmean, rvar = torch.randn(3) * 0.1, torch.rand(3) + 0.5
    rm = rmean.clone()
    rv = rvar.clone()

    def bn_train(x, scale, b, mean, var):
        return F.batch_norm(x, rm, rv, scale, b, training=True, momentum=0.1, eps=1e-5)

    case(w, "bn_train", bn_train, {"x": xb, "scale": gamma, "b": beta, "mean": rmean, "var": rvar},
         ["x", "scale", "b"])
    w.put("bn_train/running_mean", rm)
    # torch updates running_var with the unbiased batch variance; the ONNX
    # spec uses the population variance, so that output is built from
    # torch's population variance with the spec's formula.
    w.put("bn_train/running_var_spec", rvar * 0.9 + xb.var(dim=(0, 2, 3), unbiased=False) * 0.1)

    def bn_eval(x, scale, b, mean, var):
        return F.batch_norm(x, mean, var, scale, b, training=False, eps=1e-5)

    case(w, "bn_eval", bn_eval, {"x": xb, "scale": gamma, "b": beta, "mean": rmean, "var": rvar},
         ["x", "scale", "b"])

    # Gradients for input_mean / input_var: F.batch_norm takes none there, so
    # the spec's inference formula is differentiated by torch autograd.
    def bn_eval_formula(x, scale, b, mean, var):
        v = lambda t: t[None, :, None, None]
        return (x - v(mean)) / torch.sqrt(v(var) + 1e-5) * v(scale) + v(b)

    case(w, "bn_eval_stats", bn_eval_formula, {"x": xb, "scale": gamma, "b": beta, "mean": rmean, "var": rvar},
         ["mean", "var"])

    xl = torch.randn(4, 6, 8) * 1.5 + 0.3
    case(w, "ln_last", lambda x, scale, b: F.layer_norm(x, (8,), scale, b, eps=1e-5),
         {"x": xl, "scale": torch.randn(8), "b": torch.randn(8)}, ["x", "scale", "b"])
    case(w, "ln_last2", lambda x, scale, b: F.layer_norm(x, (6, 8), scale, b, eps=1e-5),
         {"x": xl, "scale": torch.randn(6, 8), "b": torch.randn(6, 8)}, ["x", "scale", "b"])
    case(w, "instnorm", lambda x, scale, b: F.instance_norm(x, weight=scale, bias=b, eps=1e-5),
         {"x": torch.randn(2, 3, 4, 5), "scale": torch.randn(3), "b": torch.randn(3)}, ["x", "scale", "b"])

    w.close()


if __name__ == "__main__":
    main()
