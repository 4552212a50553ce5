#!/usr/bin/python3
"""Speed and memory of distillation: recoup against a plain PyTorch training
loop doing the same work on the same CPU, over several architectures, in one
run. Results are ratios measured in this run, never absolute promises.

Networks (teachers; every student is made from its teacher by `recoup prune`):
  garment   the bundled Fashion-MNIST classifier (models/garment_dense.onnx),
            BatchNormalization frozen (--bn frozen)
  resnet8   a ResNet-8-style CIFAR network (16/32/64 channels, 3x32x32; the
            reference-model script's ResNet8), BatchNormalization kept and
            trained (--bn train)
  mbv2      torchvision's mobilenet_v2 at width 0.5, 10 classes, 3x64x64,
            BatchNormalization kept and trained (--bn train)
The two exported networks start from a fixed seed (no weights are downloaded).

Students: dense (the teacher itself, for the training-step comparison), 80%
and 95% unstructured (global magnitude), 2:4 and 50% of output channels.

Data: Fashion-MNIST training images from Debian's dataset-fashion-mnist; for
the 3-channel networks each image is padded to 32x32 (or padded and doubled
to 64x64) and repeated over three channels.

Both sides use the same teacher and student weights, samples, batch size,
thread count, optimizer (AdamW, lr 5e-4, no weight decay, constant rate,
gradient norm clipped at 5), loss (kd, temperature 4) and number of steps.
The PyTorch loop is what a practitioner would write: teacher forward under
no_grad every step, student forward and backward, optimizer step, masks
re-applied so that pruned weights stay zero.

Columns:
  train/s   samples per second of the training loop (recoup: its own count,
            validation included, teacher outputs cached; PyTorch: the loop)
  whole/s   steps*batch over the wall time of the whole command (recoup:
            loading, teacher pass, training, validation, verified export;
            PyTorch: interpreter start, imports, loading, loop, ONNX export)
  MiB       peak resident memory of each process
  GFLOP/s   recoup's training arithmetic (6 x dense multiply-adds per sample,
            the student's dense shape) per second, and its share of the
            single-precision GEMM peak measured here at the same thread count

Usage: /usr/bin/python3 scripts/bench.py [--steps 200] [--batch 64] [--threads 2]
                                         [--only garment resnet8 mbv2] [--quick]
--quick runs a few steps of a few rows and checks the results for sense
(commands succeed, masks stay exact, figures are finite); it asserts nothing
about speed.
"""

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
DATA = "/usr/share/datasets/fashion-mnist"
STUDENTS = {
    "dense": [],
    "80%": ["--sparsity", "0.8"],
    "95%": ["--sparsity", "0.95"],
    "2:4": ["--pattern", "2:4"],
    "ch50%": ["--channels", "0.5"],
}
# network -> (input shape, --bn mode)
NETWORKS = {
    "garment": ((1, 28, 28), "frozen"),
    "resnet8": ((3, 32, 32), "train"),
    "mbv2": ((3, 64, 64), "train"),
}
LR, TEMP, CLIP = 5e-4, 4.0, 5.0


# ---------------------------------------------------------------- models

def build_network(name):
    """A fresh PyTorch module of the network's architecture (random weights)."""
    import torch
    sys.path.insert(0, HERE)
    if name == "garment":
        import garment_demo as gd
        return gd.GarmentNet()
    import export_reference_models as ref
    torch.manual_seed(ref.SEED)
    if name == "resnet8":
        return ref.ResNet8()
    import torchvision
    return torchvision.models.mobilenet_v2(weights=None, width_mult=0.5, num_classes=10)


def export_teacher(name, path):
    """The teacher ONNX file: the bundled one, or a seeded export with
    BatchNormalization kept as nodes (names equal state_dict names)."""
    if name == "garment":
        return os.path.join(ROOT, "models", "garment_dense.onnx")
    import torch
    sys.path.insert(0, HERE)
    import export_reference_models as ref
    shape, _ = NETWORKS[name]
    model = build_network(name)
    gen = torch.Generator().manual_seed(ref.SEED)
    ref.vary_constant_parameters(model, gen)
    ref.settle_batchnorm(model, shape, "normal", gen)
    model.eval()
    x = ref.make_input(shape, "normal", gen)
    ref.scale_output_to_unit(model, x)
    ref.export(model, x, path, 17, "bn")
    return path


def shaped_like(model, state):
    """Rebuilds the Conv2d, BatchNorm2d and Linear modules of `model` with the
    shapes found in `state` (a channel-pruned student is narrower), keeping
    every other attribute, so that the practitioner's own class runs it."""
    import torch.nn as nn
    for name, mod in list(model.named_modules()):
        if not name:
            continue
        parent = model.get_submodule(name.rsplit(".", 1)[0]) if "." in name else model
        leaf = name.rsplit(".", 1)[-1]
        w = state.get(name + ".weight")
        if w is None:
            continue
        if isinstance(mod, nn.Conv2d):
            out_c = w.shape[0]
            depthwise = mod.groups > 1 and mod.groups == mod.in_channels
            groups = out_c if depthwise else mod.groups
            new = nn.Conv2d(w.shape[1] * groups, out_c, mod.kernel_size, mod.stride, mod.padding, mod.dilation,
                            groups, bias=mod.bias is not None)
        elif isinstance(mod, nn.BatchNorm2d):
            new = nn.BatchNorm2d(w.shape[0], mod.eps, mod.momentum)
        elif isinstance(mod, nn.Linear):
            new = nn.Linear(w.shape[1], w.shape[0], bias=mod.bias is not None)
        else:
            continue
        setattr(parent, leaf, new)
    return model


def torch_model(name, onnx_path):
    """The network's PyTorch class with every parameter and BatchNormalization
    statistic taken from the ONNX file's initializers."""
    import onnx
    import torch
    from onnx import numpy_helper
    m = onnx.load(onnx_path)
    inits = {t.name: torch.from_numpy(numpy_helper.to_array(t).copy()) for t in m.graph.initializer}
    model = shaped_like(build_network(name), inits)
    state = model.state_dict()
    for key in state:
        if key.endswith("num_batches_tracked"):
            continue
        if key not in inits or tuple(inits[key].shape) != tuple(state[key].shape):
            raise SystemExit(f"{onnx_path}: initializer {key!r} missing or of another shape")
        state[key] = inits[key]
    model.load_state_dict(state)
    return model


def dense_macs(model, shape):
    """Multiply-adds of one sample's forward pass through Conv2d and Linear."""
    import torch
    import torch.nn as nn
    total = [0]

    def hook(mod, inp, out):
        if isinstance(mod, nn.Conv2d):
            k = mod.kernel_size[0] * mod.kernel_size[1] * (mod.in_channels // mod.groups)
            total[0] += out.numel() * k
        else:
            total[0] += out.numel() * mod.in_features

    hs = [m.register_forward_hook(hook) for m in model.modules() if isinstance(m, (nn.Conv2d, nn.Linear))]
    with torch.no_grad():
        model.eval()(torch.zeros((1,) + tuple(shape)))
    for h in hs:
        h.remove()
    return total[0]


# ---------------------------------------------------------------- data

def write_samples(name, count, path):
    """Fashion-MNIST training images as uint8 (count, C, H, W) in .npy."""
    import numpy as np
    sys.path.insert(0, HERE)
    import garment_demo as gd
    x, _ = gd.load_split("train")             # float in [0, 1], (N, 1, 28, 28)
    x = np.rint(x[:count] * 255.0).astype(np.uint8)
    shape, _ = NETWORKS[name]
    if shape[0] == 3:
        x = np.pad(x, ((0, 0), (0, 0), (2, 2), (2, 2)))
        if shape[1] == 64:
            x = x.repeat(2, axis=2).repeat(2, axis=3)
        x = np.ascontiguousarray(np.repeat(x, 3, axis=1))
    np.save(path, x)
    return path


# ---------------------------------------------------------------- PyTorch side

def torch_loop(a):
    """Runs in a child process so that its peak memory and wall time are its own."""
    import numpy as np
    import torch
    import torch.nn.functional as F
    torch.set_num_threads(a.threads)
    torch.manual_seed(1)
    _, bn = NETWORKS[a.net]
    x = np.load(a.samples_file).astype(np.float32)
    x *= 1.0 / 255.0  # in place: one float copy, as recoup holds
    x = torch.from_numpy(x)
    teacher = torch_model(a.net, a.teacher).eval()
    student = torch_model(a.net, a.student)
    student.train(bn == "train")
    masks = {n: (p != 0).float() for n, p in student.named_parameters() if p.dim() >= 2}
    opt = torch.optim.AdamW(student.parameters(), lr=LR, weight_decay=0.0)
    order = torch.randperm(x.shape[0])
    t0 = time.perf_counter()
    for s in range(a.steps):
        start = (s * a.batch) % (x.shape[0] - a.batch + 1)
        xb = x[order[start:start + a.batch]]
        with torch.no_grad():
            t = teacher(xb)
        out = student(xb)
        loss = F.kl_div(F.log_softmax(out / TEMP, 1), F.softmax(t / TEMP, 1), reduction="batchmean") * TEMP * TEMP
        opt.zero_grad(set_to_none=True)
        loss.backward()
        torch.nn.utils.clip_grad_norm_(student.parameters(), CLIP)
        opt.step()
        with torch.no_grad():
            for n, p in student.named_parameters():
                if n in masks:
                    p.mul_(masks[n])
    dt = time.perf_counter() - t0
    student.eval()
    torch.onnx.export(student, x[:1], a.out, opset_version=17)
    print(json.dumps({"samples_per_s": a.steps * a.batch / dt, "loss": float(loss)}))


def measure_gemm_peak(threads):
    """GFLOP/s of a 1024^3 single-precision GEMM through NumPy's BLAS (OpenBLAS
    on these machines) in a child with the given thread count."""
    code = ("import numpy as np, time\n"
            "a = np.random.rand(1024, 1024).astype(np.float32); b = a.T.copy(); a @ b\n"
            "best = 0\n"
            "for _ in range(5):\n"
            "    t = time.perf_counter(); a @ b; best = max(best, 2 * 1024**3 / (time.perf_counter() - t))\n"
            "print(best / 1e9)\n")
    env = dict(os.environ, OPENBLAS_NUM_THREADS=str(threads), OMP_NUM_THREADS=str(threads))
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, env=env)
    return float(r.stdout.strip())


# ---------------------------------------------------------------- running

# A small process that starts every measured command. Linux carries a
# process's peak resident size across exec, so a child forked from this
# script (which holds PyTorch and the data) would report this script's peak;
# forked from the launcher, it reports its own.
LAUNCHER = r"""
import json, os, subprocess, sys, tempfile, time
for line in sys.stdin:
    cmd = json.loads(line)
    with tempfile.TemporaryFile(mode="w+") as err:
        t0 = time.perf_counter()
        p = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=err, text=True)
        out = p.stdout.read()
        p.stdout.close()
        _, status, usage = os.wait4(p.pid, 0)
        p.returncode = os.waitstatus_to_exitcode(status)
        wall = time.perf_counter() - t0
        err.seek(0)
        tail = err.read()[-2000:]
    print(json.dumps({"status": p.returncode, "out": out, "err": tail, "wall": wall,
                      "rss": usage.ru_maxrss * 1024}), flush=True)
"""
_launcher = None


def run_child(cmd):
    """Runs cmd through the launcher; returns (stdout, wall seconds, peak RSS
    bytes of that child alone)."""
    global _launcher
    if _launcher is None:
        _launcher = subprocess.Popen([sys.executable, "-c", LAUNCHER], stdin=subprocess.PIPE,
                                     stdout=subprocess.PIPE, text=True)
    _launcher.stdin.write(json.dumps(cmd) + "\n")
    _launcher.stdin.flush()
    r = json.loads(_launcher.stdout.readline())
    if r["status"] != 0:
        raise SystemExit(f"failed ({r['status']}): {' '.join(cmd)}\n{r['err']}")
    return r["out"], r["wall"], r["rss"]


def zero_count(path):
    import numpy as np
    import onnx
    from onnx import numpy_helper
    m = onnx.load(path)
    return {t.name: np.flatnonzero(numpy_helper.to_array(t) == 0) for t in m.graph.initializer
            if len(t.dims) >= 2}


def bench_row(a, net, label, teacher, samples, tmp, gemm_peak, macs_cache):
    shape, bn = NETWORKS[net]
    student = teacher
    if STUDENTS[label]:
        student = os.path.join(tmp, f"{net}_{label.replace(':', '-').replace('%', 'p')}.onnx")
        run_child([a.recoup, "prune", teacher, "--out", student, "--json"] + STUDENTS[label])
    out = os.path.join(tmp, "recovered.onnx")
    scale = "0.00392156862745098"
    cmd = [a.recoup, "distill", "--teacher", teacher, "--student", student, "--data", samples, "--scale", scale,
           "--steps", str(a.steps), "--batch", str(a.batch), "--threads", str(a.threads), "--bn", bn,
           "--optimizer", "adamw", "--lr", str(LR), "--weight-decay", "0", "--schedule", "constant",
           "--warmup", "0", "--clip", str(CLIP), "--temperature", str(TEMP), "--loss", "kd",
           "--checkpoint-every", "0", "--json", "--out", out]
    stdout, wall, rss = run_child(cmd)
    res = json.loads(stdout)
    before, after = zero_count(student), zero_count(out)
    for name, zeros in before.items():
        if name in after and not set(zeros.tolist()) <= set(after[name].tolist()):
            raise SystemExit(f"{net} {label}: recovered file lost pruned zeros of {name}")
    t_out = os.path.join(tmp, "torch.onnx")
    tstdout, twall, trss = run_child([sys.executable, os.path.abspath(__file__), "--torch-child", "--net", net,
                                      "--teacher", teacher, "--student", student, "--samples-file", samples,
                                      "--steps", str(a.steps), "--batch", str(a.batch), "--threads",
                                      str(a.threads), "--out", t_out])
    tr = json.loads(tstdout.strip().splitlines()[-1])
    if student not in macs_cache:
        macs_cache[student] = dense_macs(torch_model(net, student), shape)
    work = a.steps * a.batch
    gflops = 6 * macs_cache[student] * res["samples_per_s"] / 1e9
    row = {"network": net, "student": label, "recoup_train": res["samples_per_s"], "torch_train": tr["samples_per_s"],
           "recoup_whole": work / wall, "torch_whole": work / twall, "recoup_mib": rss / 2**20,
           "torch_mib": trss / 2**20, "gflops": gflops, "gemm_share": gflops / gemm_peak,
           "macs": macs_cache[student]}
    for k, v in row.items():
        if isinstance(v, float) and not (math.isfinite(v) and v > 0):
            raise SystemExit(f"{net} {label}: {k} = {v} is not a positive finite figure")
    return row


def print_table(rows, a, gemm_peak):
    print(f"distillation, {a.steps} steps x batch {a.batch}, {a.threads} threads, same CPU, same run; "
          f"GEMM peak {gemm_peak:.1f} GFLOP/s")
    head = ("| network | student | recoup train/s | PyTorch train/s | ratio | recoup whole/s | PyTorch whole/s "
            "| ratio | recoup MiB | PyTorch MiB | recoup GFLOP/s (of peak) |")
    print(head)
    print("|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|")
    for r in rows:
        print(f"| {r['network']} | {r['student']} | {r['recoup_train']:.0f} | {r['torch_train']:.0f} | "
              f"{r['recoup_train'] / r['torch_train']:.2f}x | {r['recoup_whole']:.0f} | {r['torch_whole']:.0f} | "
              f"{r['recoup_whole'] / r['torch_whole']:.2f}x | {r['recoup_mib']:.0f} | {r['torch_mib']:.0f} | "
              f"{r['gflops']:.1f} ({100 * r['gemm_share']:.0f}%) |")


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--steps", type=int, default=200)
    ap.add_argument("--batch", type=int, default=64)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--samples", type=int, default=6000, help="training images per network (default 6000)")
    ap.add_argument("--only", nargs="+", choices=sorted(NETWORKS), help="networks to measure (default all)")
    ap.add_argument("--students", nargs="+", choices=list(STUDENTS), help="students to measure (default all)")
    ap.add_argument("--quick", action="store_true", help="a few steps of a few rows; sense checks only")
    ap.add_argument("--json", help="also write the rows to this JSON file")
    ap.add_argument("--recoup", default=os.path.join(ROOT, "build", "recoup"))
    ap.add_argument("--torch-child", action="store_true", help=argparse.SUPPRESS)
    for hidden in ("--net", "--teacher", "--student", "--samples-file", "--out"):
        ap.add_argument(hidden, help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.torch_child:
        torch_loop(a)
        return
    nets = a.only or list(NETWORKS)
    students = a.students or list(STUDENTS)
    if a.quick:
        a.steps, a.batch, a.samples = 2, 8, 64
        nets = a.only or ["garment", "resnet8"]
        students = a.students or ["95%", "ch50%"]
    run_child(["true"])  # the launcher starts while this process is still small
    gemm_peak = measure_gemm_peak(a.threads)
    rows, macs_cache = [], {}
    with tempfile.TemporaryDirectory(prefix="recoup-bench-") as tmp:
        for net in nets:
            teacher = export_teacher(net, os.path.join(tmp, f"{net}_teacher.onnx"))
            samples = write_samples(net, a.samples, os.path.join(tmp, f"{net}_samples.npy"))
            for label in students:
                rows.append(bench_row(a, net, label, teacher, samples, tmp, gemm_peak, macs_cache))
                print(f"  measured {net} {label}", file=sys.stderr, flush=True)
    print_table(rows, a, gemm_peak)
    if a.json:
        with open(a.json, "w") as f:
            json.dump({"steps": a.steps, "batch": a.batch, "threads": a.threads, "gemm_peak_gflops": gemm_peak,
                       "rows": rows}, f, indent=1)
    if a.quick:
        print("quick run: sense checks passed (no speed is asserted)")


if __name__ == "__main__":
    main()
