#!/usr/bin/python3
"""Speed and memory of a distillation step: recoup against a plain PyTorch
training loop doing the same work on the same CPU, in the same run.

Both recover the bundled 90%-pruned garment classifier from the dense one on
Fashion-MNIST training images, with the same batch size, thread count,
optimizer (AdamW, lr 5e-4), loss (kd, temperature 4) and number of steps. The
PyTorch loop is what a practitioner would write: teacher forward under
no_grad, student forward and backward, optimizer step, masks re-applied to
keep pruned weights at zero. Results are ratios measured in this run, never
absolute promises.

Usage: /usr/bin/python3 scripts/bench.py [--steps 300] [--batch 64] [--threads 2] [--recoup build/recoup]
"""

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
DATA = "/usr/share/datasets/fashion-mnist"


def torch_loop(steps, batch, threads):
    """Runs in a child process so that its peak memory is its own."""
    import numpy as np
    import torch
    import torch.nn.functional as F

    sys.path.insert(0, HERE)
    import garment_demo as gd

    torch.set_num_threads(threads)
    torch.manual_seed(1)
    x, _ = gd.load_split("train")
    teacher = gd.model_from_onnx(os.path.join(ROOT, "models", "garment_dense.onnx")).eval()
    student = gd.model_from_onnx(os.path.join(ROOT, "models", "garment_pruned90.onnx")).eval()
    masks = {n: (p != 0).float() for n, p in student.named_parameters() if p.dim() >= 2}
    opt = torch.optim.AdamW(student.parameters(), lr=5e-4, weight_decay=0.0)
    xt = torch.from_numpy(x)
    order = torch.randperm(xt.shape[0])
    T = 4.0
    t0 = time.perf_counter()
    for s in range(steps):
        idx = order[(s * batch) % (xt.shape[0] - batch):][:batch]
        xb = xt[idx]
        with torch.no_grad():
            t = teacher(xb)
        out = student(xb)
        loss = F.kl_div(F.log_softmax(out / T, 1), F.softmax(t / T, 1), reduction="batchmean") * T * T
        opt.zero_grad(set_to_none=True)
        loss.backward()
        torch.nn.utils.clip_grad_norm_(student.parameters(), 5.0)
        opt.step()
        with torch.no_grad():
            for n, p in student.named_parameters():
                if n in masks:
                    p.mul_(masks[n])
    dt = time.perf_counter() - t0
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(json.dumps({"samples_per_s": steps * batch / dt, "loop_seconds": dt, "peak_rss": rss}))


def run_recoup(recoup, steps, batch, threads, out_dir):
    out = os.path.join(out_dir, "recovered.onnx")
    cmd = [recoup, "distill", "--teacher", os.path.join(ROOT, "models", "garment_dense.onnx"),
           "--student", os.path.join(ROOT, "models", "garment_pruned90.onnx"),
           "--data", f"{DATA}/train-images-idx3-ubyte.gz", "--scale", "0.00392156862745098",
           "--steps", str(steps), "--batch", str(batch), "--threads", str(threads), "--json", "--out", out]
    t0 = time.perf_counter()
    p = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    stdout, _ = p.communicate()
    status = p.returncode
    wall = time.perf_counter() - t0
    if status != 0:
        raise SystemExit(f"recoup failed ({status})")
    res = json.loads(stdout)
    return res, wall


def child_rss():
    return resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--steps", type=int, default=300)
    ap.add_argument("--batch", type=int, default=64)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--recoup", default=os.path.join(ROOT, "build", "recoup"))
    ap.add_argument("--torch-child", action="store_true", help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.torch_child:
        torch_loop(a.steps, a.batch, a.threads)
        return
    with tempfile.TemporaryDirectory(prefix="recoup-bench-") as tmp:
        # recoup first: RUSAGE_CHILDREN's peak then belongs to it alone.
        res, wall = run_recoup(a.recoup, a.steps, a.batch, a.threads, tmp)
        recoup_rss = child_rss()
        t0 = time.perf_counter()
        r = subprocess.run([sys.executable, os.path.abspath(__file__), "--torch-child", "--steps", str(a.steps),
                            "--batch", str(a.batch), "--threads", str(a.threads)],
                           capture_output=True, text=True, check=True)
        torch_wall = time.perf_counter() - t0
        tr = json.loads(r.stdout.strip().splitlines()[-1])
    speed = res["samples_per_s"] / tr["samples_per_s"]
    mem = tr["peak_rss"] / max(recoup_rss, 1)
    print(f"distillation steps: {a.steps} x batch {a.batch}, {a.threads} threads, same CPU, same run")
    print(f"{'':28}{'recoup':>14}{'PyTorch loop':>16}{'ratio':>10}")
    print(f"{'training samples/s':28}{res['samples_per_s']:14.0f}{tr['samples_per_s']:16.0f}{speed:9.2f}x")
    print(f"{'peak resident memory (MiB)':28}{recoup_rss / 2**20:14.1f}{tr['peak_rss'] / 2**20:16.1f}"
          f"{mem:9.2f}x less")
    print(f"{'whole run, wall seconds':28}{wall:14.1f}{torch_wall:16.1f}")
    print("recoup's samples/s counts its training loop (validation included); the PyTorch loop's counts its "
          "steps only. Whole-run times include loading and, for recoup, one teacher pass over the data.")


if __name__ == "__main__":
    main()
