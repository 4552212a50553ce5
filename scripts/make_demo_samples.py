#!/usr/bin/python3
"""Write a few Fashion-MNIST test images and PyTorch's logits for the demo
models, as .npy files for runtime comparisons (tests/ort.cmake).

Usage: /usr/bin/python3 scripts/make_demo_samples.py OUT_DIR [--count N] [MODEL.onnx ...]

OUT_DIR/images.npy      float32 (N,1,28,28): the first N test images, x/255
OUT_DIR/labels.npy      int64 (N): their labels
OUT_DIR/<stem>.logits.npy  float32 (N,10): PyTorch (Debian python3-torch)
                        running GarmentNet with the weights of MODEL.onnx
Models default to models/garment_dense.onnx and models/garment_pruned90.onnx.
Data: Fashion-MNIST (Xiao, Rasul, Vollgraf 2017; Debian dataset-fashion-mnist).
"""

import argparse
import os
import sys

import numpy as np
import torch

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
import garment_demo as gd  # noqa: E402


def main():
    models = os.path.join(HERE, "..", "models")
    ap = argparse.ArgumentParser(description="Fashion-MNIST samples and PyTorch logits for the demo models.")
    ap.add_argument("out_dir")
    ap.add_argument("models", nargs="*", default=[os.path.join(models, "garment_dense.onnx"),
                                                   os.path.join(models, "garment_pruned90.onnx")])
    ap.add_argument("--count", type=int, default=16)
    args = ap.parse_args()
    if not 1 <= args.count <= 10000:
        raise SystemExit(f"--count {args.count}: expected 1..10000")
    torch.set_num_threads(2)
    os.makedirs(args.out_dir, exist_ok=True)
    x, y = gd.load_split("test")
    x, y = x[:args.count], y[:args.count]
    np.save(os.path.join(args.out_dir, "images.npy"), x)
    np.save(os.path.join(args.out_dir, "labels.npy"), y)
    for path in args.models:
        stem = os.path.splitext(os.path.basename(path))[0]
        logits = gd.logits_of(gd.model_from_onnx(path), x).astype(np.float32)
        np.save(os.path.join(args.out_dir, f"{stem}.logits.npy"), logits)
        print(f"{stem}: {int((logits.argmax(1) == y).sum())}/{len(y)} of the first test images right")
    print(f"wrote {args.count} samples to {args.out_dir}")


if __name__ == "__main__":
    main()
