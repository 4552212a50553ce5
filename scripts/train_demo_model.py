#!/usr/bin/python3
"""Train the demo garment classifier on Fashion-MNIST and export it to ONNX.

Usage: /usr/bin/python3 scripts/train_demo_model.py [OUT.onnx] [--epochs N]

Scenario (invented for the demo): a textile-recycling depot sorts donated
garments on a conveyor; a small handheld camera classifier, meant for a
microcontroller-class device, suggests one of ten garment classes. The data
is Fashion-MNIST (Xiao, Rasul, Vollgraf 2017; Debian dataset-fashion-mnist),
28x28 greyscale product photos, not photos taken at a depot.

Input "image": float32 (N,1,28,28), pixel/255 in [0,1]. Output "logits":
float32 (N,10), class order as garment_demo.CLASSES.
Seeds are fixed and torch runs on 2 threads so that reruns give the same file.
"""

import argparse
import os
import sys
import time

import numpy as np
import torch
import torch.nn.functional as F

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import garment_demo as gd  # noqa: E402

SEED = 20240611


def main():
    here = os.path.dirname(os.path.abspath(__file__))
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("out", nargs="?", default=os.path.join(here, "..", "models", "garment_dense.onnx"))
    ap.add_argument("--epochs", type=int, default=4)
    ap.add_argument("--batch", type=int, default=128)
    args = ap.parse_args()

    torch.set_num_threads(2)
    torch.manual_seed(SEED)
    rng = np.random.default_rng(SEED)

    x_train, y_train = gd.load_split("train")
    x_test, y_test = gd.load_split("test")
    xt, yt = torch.from_numpy(x_train), torch.from_numpy(y_train)

    model = gd.GarmentNet()
    steps_per_epoch = (len(x_train) + args.batch - 1) // args.batch
    opt = torch.optim.Adam(model.parameters(), lr=2e-3)
    sched = torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=4e-3, epochs=args.epochs,
                                                steps_per_epoch=steps_per_epoch)
    t0 = time.time()
    for epoch in range(args.epochs):
        model.train()
        order = torch.from_numpy(rng.permutation(len(x_train)))
        total = 0.0
        for i in range(0, len(order), args.batch):
            idx = order[i:i + args.batch]
            loss = F.cross_entropy(model(xt[idx]), yt[idx])
            opt.zero_grad()
            loss.backward()
            opt.step()
            sched.step()
            total += loss.item() * len(idx)
        acc = gd.accuracy(model, x_test, y_test)
        print(f"epoch {epoch + 1}/{args.epochs}: train loss {total / len(x_train):.4f}, "
              f"test accuracy {acc:.4f} ({time.time() - t0:.0f} s)", flush=True)

    out = os.path.abspath(args.out)
    gd.export_onnx(model, out)
    gd.check_exported(out)
    # Measure the exported weights, not the in-memory model, so the number
    # printed is the file's.
    acc = gd.accuracy(gd.model_from_onnx(out), x_test, y_test)
    n_params = sum(p.numel() for p in model.parameters())
    print(f"wrote {out}: {os.path.getsize(out)} bytes, {n_params} parameters")
    print(f"test accuracy on the 10,000 Fashion-MNIST test images: {acc:.4f}")


if __name__ == "__main__":
    main()
