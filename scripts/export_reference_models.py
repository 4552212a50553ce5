#!/usr/bin/python3
"""Export randomly initialised reference models to ONNX with PyTorch
(Debian python3-torch / python3-torchvision), together with their inputs,
PyTorch's outputs and PyTorch's gradients, for recoup's reference tests.

Usage: /usr/bin/python3 scripts/export_reference_models.py OUT_DIR [--only NAME ...]

Nothing is downloaded: torchvision models are built with weights=None and
every model is initialised from a fixed seed. Each model is exported at
opsets 13 and 17 in two variants:

  fused  torch's default export (eval mode, constant folding on), which folds
         BatchNormalization into the preceding Conv where it can;
  bn     BatchNormalization kept as nodes (training=PRESERVE on an eval-mode
         model, constant folding off), so initializer names equal the
         state_dict names; the batch dimension is symbolic ("batch").

Each case folder OUT_DIR/<model>_op<opset>_<variant>/ holds
  model.onnx     the exported model (checked with onnx.checker)
  input_0.npy    float32 input, batch 2, fixed seed
  output_0.npy   PyTorch's output for that input (eval mode)
and for the bn variant also
  loss_weights.npy  R, same shape as the output, fixed seed
  grads.npz         d(L)/d(param) for every parameter, keyed by the ONNX
                    initializer name, and d(L)/d(input) as "__input__",
                    where L = sum(output * R), BatchNormalization in eval
                    mode (running statistics).
OUT_DIR/manifest.txt lists the case folders, one per line, with the model,
opset, variant, input shape and output shape. A complete OUT_DIR made by the
same script and library versions is kept as it is (--force re-exports).
"""

import argparse
import hashlib
import os
import shutil
import sys
import time

import numpy as np
import onnx
import torch
import torch.nn as nn
import torch.nn.functional as F
import torchvision

SEED = 1234
OPSETS = (13, 17)
VARIANTS = ("fused", "bn")


# ---------------------------------------------------------------- models

class MLP(nn.Module):
    def __init__(self):
        super().__init__()
        self.fc1 = nn.Linear(64, 128)
        self.fc2 = nn.Linear(128, 64)
        self.fc3 = nn.Linear(64, 10)
        self.drop = nn.Dropout(0.2)

    def forward(self, x):  # x (N,64)
        x = F.relu(self.fc1(x))
        x = self.drop(torch.tanh(self.fc2(x)))
        return self.fc3(x)


class LeNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv1 = nn.Conv2d(1, 6, 5, padding=2)
        self.conv2 = nn.Conv2d(6, 16, 5)
        self.fc1 = nn.Linear(16 * 5 * 5, 120)
        self.fc2 = nn.Linear(120, 84)
        self.fc3 = nn.Linear(84, 10)

    def forward(self, x):  # x (N,1,28,28)
        x = F.max_pool2d(F.relu(self.conv1(x)), 2)    # (N,6,14,14)
        x = F.avg_pool2d(torch.tanh(self.conv2(x)), 2)  # (N,16,5,5)
        x = torch.flatten(x, 1)
        x = F.relu(self.fc1(x))
        x = F.relu(self.fc2(x))
        return self.fc3(x)


class BasicBlock(nn.Module):
    def __init__(self, cin, cout, stride):
        super().__init__()
        self.conv1 = nn.Conv2d(cin, cout, 3, stride, 1, bias=False)
        self.bn1 = nn.BatchNorm2d(cout)
        self.conv2 = nn.Conv2d(cout, cout, 3, 1, 1, bias=False)
        self.bn2 = nn.BatchNorm2d(cout)
        self.short = None
        if stride != 1 or cin != cout:
            self.short = nn.Sequential(nn.Conv2d(cin, cout, 1, stride, bias=False), nn.BatchNorm2d(cout))

    def forward(self, x):
        y = F.relu(self.bn1(self.conv1(x)))
        y = self.bn2(self.conv2(y))
        return F.relu(y + (x if self.short is None else self.short(x)))


class ResNet8(nn.Module):
    """Stem plus three residual basic blocks (16, 32, 64 channels)."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Sequential(nn.Conv2d(3, 16, 3, 1, 1, bias=False), nn.BatchNorm2d(16), nn.ReLU())
        self.blocks = nn.Sequential(BasicBlock(16, 16, 1), BasicBlock(16, 32, 2), BasicBlock(32, 64, 2))
        self.fc = nn.Linear(64, 10)

    def forward(self, x):  # x (N,3,32,32)
        x = self.blocks(self.stem(x))
        x = F.adaptive_avg_pool2d(x, 1).flatten(1)
        return self.fc(x)


class TinyViT(nn.Module):
    """Patch embedding conv, class token, position embedding, pre-norm
    transformer blocks with hand-written multi-head self-attention and GELU
    MLPs, LayerNorm, linear head."""

    def __init__(self, img=32, patch=8, dim=48, heads=4, depth=2, classes=10):
        super().__init__()
        self.heads = heads
        self.embed = nn.Conv2d(3, dim, patch, patch)
        n = (img // patch) ** 2
        self.cls = nn.Parameter(torch.randn(1, 1, dim) * 0.02)
        self.pos = nn.Parameter(torch.randn(1, n + 1, dim) * 0.02)
        self.blocks = nn.ModuleList()
        for _ in range(depth):
            self.blocks.append(nn.ModuleDict({
                "norm1": nn.LayerNorm(dim), "qkv": nn.Linear(dim, 3 * dim), "proj": nn.Linear(dim, dim),
                "norm2": nn.LayerNorm(dim), "fc1": nn.Linear(dim, 2 * dim), "fc2": nn.Linear(2 * dim, dim)}))
        self.norm = nn.LayerNorm(dim)
        self.head = nn.Linear(dim, classes)

    def attention(self, blk, x):
        b, t, d = x.shape
        hd = d // self.heads
        qkv = blk["qkv"](x).reshape(b, t, 3, self.heads, hd).permute(2, 0, 3, 1, 4)
        q, k, v = qkv[0], qkv[1], qkv[2]                      # (B,H,T,hd)
        att = torch.softmax(q @ k.transpose(-2, -1) * hd ** -0.5, dim=-1)
        y = (att @ v).transpose(1, 2).reshape(b, t, d)
        return blk["proj"](y)

    def forward(self, x):  # x (N,3,32,32)
        x = self.embed(x).flatten(2).transpose(1, 2)          # (N,16,dim)
        x = torch.cat([self.cls.expand(x.shape[0], -1, -1), x], dim=1) + self.pos
        for blk in self.blocks:
            x = x + self.attention(blk, blk["norm1"](x))
            x = x + blk["fc2"](F.gelu(blk["fc1"](blk["norm2"](x))))
        return self.head(self.norm(x)[:, 0])


class KeywordCNN(nn.Module):
    """1-D CNN over 40 spectral features x 49 frames (a one-second clip at a
    20 ms hop, a common keyword-spotting front end), 12 classes."""

    def __init__(self):
        super().__init__()
        self.conv1 = nn.Conv1d(40, 32, 3, padding=1)
        self.bn1 = nn.BatchNorm1d(32)
        self.conv2 = nn.Conv1d(32, 48, 3, padding=2, dilation=2)
        self.bn2 = nn.BatchNorm1d(48)
        self.conv3 = nn.Conv1d(48, 64, 3, stride=2)
        self.bn3 = nn.BatchNorm1d(64)
        self.fc = nn.Linear(64, 12)

    def forward(self, x):  # x (N,40,49)
        x = F.max_pool1d(F.relu(self.bn1(self.conv1(x))), 2)  # (N,32,24)
        x = F.avg_pool1d(F.relu(self.bn2(self.conv2(x))), 2)  # (N,48,12)
        x = F.relu(self.bn3(self.conv3(x)))                    # (N,64,5)
        x = F.adaptive_avg_pool1d(x, 1).flatten(1)
        return self.fc(x)


class ConvAutoencoder(nn.Module):
    """Strided conv encoder; decoder with ConvTranspose and Resize (bilinear
    and nearest upsampling)."""

    def __init__(self):
        super().__init__()
        self.enc1 = nn.Conv2d(1, 8, 3, 2, 1)
        self.bn1 = nn.BatchNorm2d(8)
        self.enc2 = nn.Conv2d(8, 16, 3, 2, 1)
        self.bn2 = nn.BatchNorm2d(16)
        self.enc3 = nn.Conv2d(16, 16, 3, 2, 1)
        self.dec1 = nn.ConvTranspose2d(16, 16, 3, stride=2, padding=1, output_padding=1)
        self.bn3 = nn.BatchNorm2d(16)
        self.up = nn.Upsample(scale_factor=2, mode="nearest")
        self.dec2 = nn.Conv2d(16, 8, 3, padding=1)
        self.dec3 = nn.ConvTranspose2d(8, 4, 2, stride=1)
        self.out = nn.Conv2d(4, 1, 3, padding=1)

    def forward(self, x):  # x (N,1,32,32)
        x = F.relu(self.bn1(self.enc1(x)))       # (N,8,16,16)
        x = F.relu(self.bn2(self.enc2(x)))       # (N,16,8,8)
        x = F.relu(self.enc3(x))                 # (N,16,4,4)
        x = F.relu(self.bn3(self.dec1(x)))       # (N,16,8,8)
        x = self.up(x)                           # (N,16,16,16)
        x = F.relu(self.dec2(x))                 # (N,8,16,16)
        x = F.relu(self.dec3(x))                 # (N,4,17,17)
        x = F.interpolate(x, size=(32, 32), mode="bilinear", align_corners=False)
        return torch.sigmoid(self.out(x))


def tv(name, **kw):
    return lambda: getattr(torchvision.models, name)(weights=None, **kw)


# name -> (builder, input shape without batch, input kind)
MODELS = {
    "mlp": (MLP, (64,), "normal"),
    "lenet": (LeNet, (1, 28, 28), "unit"),
    "resnet8": (ResNet8, (3, 32, 32), "normal"),
    "mobilenet_v2": (tv("mobilenet_v2", num_classes=10), (3, 64, 64), "normal"),
    "mobilenet_v3_small": (tv("mobilenet_v3_small", num_classes=10), (3, 64, 64), "normal"),
    "shufflenet_v2_x0_5": (tv("shufflenet_v2_x0_5", num_classes=10), (3, 64, 64), "normal"),
    # 65x65: every ceil_mode MaxPool in squeezenet1_1 rounds up (checked below).
    "squeezenet1_1": (tv("squeezenet1_1", num_classes=10), (3, 65, 65), "normal"),
    "efficientnet_b0": (tv("efficientnet_b0", num_classes=10), (3, 64, 64), "normal"),
    "vit_tiny": (TinyViT, (3, 32, 32), "normal"),
    "kws_cnn1d": (KeywordCNN, (40, 49), "normal"),
    "conv_autoencoder": (ConvAutoencoder, (1, 32, 32), "unit"),
}
BATCH = 2


# ---------------------------------------------------------------- helpers

def make_input(shape, kind, gen):
    if kind == "unit":
        return torch.rand((BATCH,) + shape, generator=gen)
    return torch.randn((BATCH,) + shape, generator=gen)


def vary_constant_parameters(model, gen):
    """Parameters that start out constant (BatchNorm/LayerNorm scale 1 and
    shift 0, zero-initialised biases) get small random offsets: the test then
    sees their effect, and torch's exporter does not merge identical
    initializers into one (which would break name equality)."""
    with torch.no_grad():
        for p in model.parameters():
            flat = p.reshape(-1)
            if flat.numel() > 0 and bool((flat == flat[0]).all()):
                p.add_(0.1 * torch.randn(p.shape, generator=gen))


def settle_batchnorm(model, shape, kind, gen):
    """Give BatchNorm non-trivial running statistics: a few train-mode
    forward passes on random data (momentum 0.1 by default)."""
    if not any(isinstance(m, nn.modules.batchnorm._BatchNorm) for m in model.modules()):
        return False
    model.train()
    with torch.no_grad():
        for _ in range(4):
            x = make_input(shape, kind, gen) * 1.5 + 0.3
            model(torch.cat([x, x.flip(0) * 0.5]))  # batch 4 keeps 1-D BN happy
    return True


def scale_output_to_unit(model, x):
    """Random-initialised classifiers give tiny logits (torchvision starts its
    heads at std 0.01), which would make an absolute tolerance meaningless.
    When the model's output is its last Linear layer's output, scale that
    layer so the output has standard deviation 1."""
    linears = [m for m in model.modules() if isinstance(m, nn.Linear)]
    if not linears:
        return
    seen = []
    handle = linears[-1].register_forward_hook(lambda mod, inp, out: seen.append(out))
    with torch.no_grad():
        y = model(x)
    handle.remove()
    if not seen or not torch.equal(seen[-1], y):
        return
    with torch.no_grad():
        k = 1.0 / float(y.std())
        linears[-1].weight.mul_(k)
        linears[-1].bias.mul_(k)


def check_ceil_mode_rounds_up(model, x):
    """For every MaxPool2d with ceil_mode, record whether the output is larger
    than floor mode would give; the squeezenet case must exercise it."""
    hits = []

    def hook(mod, inp, out):
        floor = F.max_pool2d(inp[0], mod.kernel_size, mod.stride, mod.padding, mod.dilation, ceil_mode=False)
        hits.append(out.shape[-1] > floor.shape[-1])

    handles = [m.register_forward_hook(hook) for m in model.modules()
               if isinstance(m, nn.MaxPool2d) and m.ceil_mode]
    with torch.no_grad():
        model(x)
    for h in handles:
        h.remove()
    return hits


def export(model, x, path, opset, variant):
    kw = dict(opset_version=opset, input_names=["input"], output_names=["output"])
    if variant == "bn":
        kw.update(training=torch.onnx.TrainingMode.PRESERVE, do_constant_folding=False,
                  dynamic_axes={"input": {0: "batch"}, "output": {0: "batch"}})
    torch.onnx.export(model, x, path, **kw)
    m = onnx.load(path)
    onnx.checker.check_model(m)
    return m


def count_ops(m, op):
    return sum(1 for n in m.graph.node if n.op_type == op)


def gradients(model, x, r, onnx_model, case):
    """d(sum(out * R))/d(param) keyed by ONNX initializer name, and
    d/d(input) as "__input__"."""
    inits = {t.name for t in onnx_model.graph.initializer}
    model.zero_grad(set_to_none=True)
    xi = x.clone().requires_grad_(True)
    (model(xi) * r).sum().backward()
    grads = {"__input__": xi.grad.numpy().astype(np.float32)}
    for name, p in model.named_parameters():
        if p.grad is None:
            continue
        if name not in inits:
            raise SystemExit(f"{case}: parameter {name!r} is not an initializer of the exported model")
        grads[name] = p.grad.numpy().astype(np.float32)
    return grads


def shape_str(a):
    return "x".join(str(d) for d in a.shape)


def export_model(name, out_dir, manifest):
    builder, shape, kind = MODELS[name]
    torch.manual_seed(SEED)
    gen = torch.Generator().manual_seed(SEED)
    model = builder()
    vary_constant_parameters(model, gen)
    has_bn = settle_batchnorm(model, shape, kind, gen)
    model.eval()
    x = make_input(shape, kind, gen)
    scale_output_to_unit(model, x)
    if name == "squeezenet1_1":
        hits = check_ceil_mode_rounds_up(model, x)
        if not hits or not all(hits):
            raise SystemExit(f"squeezenet1_1 at {shape}: ceil_mode does not round up at every MaxPool ({hits})")
    with torch.no_grad():
        y = model(x)
    r = torch.randn(y.shape, generator=gen)
    grads = None
    for opset in OPSETS:
        for variant in VARIANTS:
            case = f"{name}_op{opset}_{variant}"
            d = os.path.join(out_dir, case)
            os.makedirs(d, exist_ok=True)
            m = export(model, x, os.path.join(d, "model.onnx"), opset, variant)
            n_bn = count_ops(m, "BatchNormalization")
            if variant == "bn" and has_bn and n_bn == 0:
                raise SystemExit(f"{case}: BatchNormalization was not kept")
            np.save(os.path.join(d, "input_0.npy"), x.numpy().astype(np.float32))
            np.save(os.path.join(d, "output_0.npy"), y.numpy().astype(np.float32))
            if variant == "bn":
                if grads is None:
                    grads = gradients(model, x, r, m, case)
                np.save(os.path.join(d, "loss_weights.npy"), r.numpy().astype(np.float32))
                np.savez(os.path.join(d, "grads.npz"), **grads)
            manifest.append(f"{case} {name} {opset} {variant} {shape_str(x)} {shape_str(y)}")
            print(f"  {case}: {len(m.graph.node)} nodes, {n_bn} BatchNormalization, "
                  f"output {tuple(y.shape)}", flush=True)


def stamp_of(names):
    """Identifies what an export depends on: this script, the library
    versions and the models asked for."""
    h = hashlib.sha256()
    with open(os.path.abspath(__file__), "rb") as f:
        h.update(f.read())
    h.update(f"{torch.__version__} {torchvision.__version__} {onnx.__version__} {' '.join(names)}".encode())
    return h.hexdigest()[:16]


def up_to_date(out_dir, stamp):
    """True when out_dir holds a complete export with the same stamp."""
    try:
        with open(os.path.join(out_dir, "manifest.txt")) as f:
            lines = f.read().splitlines()
    except OSError:
        return False
    if f"# stamp {stamp}" not in lines:
        return False
    for line in lines:
        if not line or line.startswith("#"):
            continue
        case, variant = line.split()[0], line.split()[3]
        need = ["model.onnx", "input_0.npy", "output_0.npy"]
        if variant == "bn":
            need += ["loss_weights.npy", "grads.npz"]
        if not all(os.path.isfile(os.path.join(out_dir, case, n)) for n in need):
            return False
    return True


def main():
    ap = argparse.ArgumentParser(description="Export reference models with PyTorch.")
    ap.add_argument("out_dir")
    ap.add_argument("--only", nargs="+", choices=sorted(MODELS), help="export only these models")
    ap.add_argument("--force", action="store_true", help="export even if OUT_DIR is up to date")
    args = ap.parse_args()
    torch.set_num_threads(2)
    out_dir = os.path.abspath(args.out_dir)
    names = list(args.only or MODELS)
    stamp = stamp_of(names)
    if not args.force and up_to_date(out_dir, stamp):
        print(f"{out_dir} is up to date (stamp {stamp}); --force exports again")
        return
    # Start clean so the manifest never lists stale cases; write into a
    # sibling folder and swap it in at the end so a failed run leaves no
    # half-written set behind.
    tmp = out_dir + ".partial"
    shutil.rmtree(tmp, ignore_errors=True)
    os.makedirs(tmp)
    manifest = []
    t0 = time.time()
    import warnings
    warnings.filterwarnings("ignore")  # torch.onnx tracer warnings are expected
    for name in names:
        print(f"{name}:", flush=True)
        export_model(name, tmp, manifest)
    with open(os.path.join(tmp, "manifest.txt"), "w") as f:
        f.write("# case model opset variant input_shape output_shape\n")
        f.write(f"# stamp {stamp}\n")
        f.write(f"# exported by torch {torch.__version__}, torchvision {torchvision.__version__}, "
                f"onnx {onnx.__version__}\n")
        f.write("\n".join(manifest) + "\n")
    shutil.rmtree(out_dir, ignore_errors=True)
    os.replace(tmp, out_dir)
    print(f"{len(manifest)} cases in {out_dir} ({time.time() - t0:.0f} s)")


if __name__ == "__main__":
    main()
