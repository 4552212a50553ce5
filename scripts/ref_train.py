#!/usr/bin/python3
"""Reference values for the training numerics, computed with PyTorch.

Run with Debian's python3 (python3-torch). Writes into OUT_DIR one raw
little-endian float32 file per array (<name>.f32) and index.txt with one
"<name> <count>" line per array; tests/test_train_ref.c reads them.

Losses: KLDivLoss(reduction='batchmean') on log_softmax(s/T) against
softmax(t/T), times T^2, for T in 1, 4, 20; cross_entropy on integer labels;
mse_loss (mean) between logits; each with its autograd gradient.
Optimizers: ten steps of torch.optim.SGD (momentum, Nesterov, weight decay)
and torch.optim.AdamW on a small linear regression, recording the gradient
fed to each step and the parameters after it, so the C side can replay the
same gradients. Also torch.nn.utils.clip_grad_norm_ on a fixed gradient.
"""
import os
import sys

import numpy as np
import torch
import torch.nn.functional as F

arrays = []


def put(name, tensor):
    arr = np.ascontiguousarray(
        tensor.detach().cpu().numpy() if torch.is_tensor(tensor) else np.asarray(tensor),
        dtype="<f4").reshape(-1)
    arrays.append((name, arr))


def losses(gen):
    n, k = 6, 7
    s = (torch.randn(n, k, generator=gen) * 3.0)
    t = (torch.randn(n, k, generator=gen) * 3.0)
    labels = torch.tensor([0, 6, 3, 3, 1, 5])
    put("student", s)
    put("teacher", t)
    put("labels", labels.float())
    for temp in (1.0, 4.0, 20.0):
        x = s.clone().requires_grad_(True)
        loss = torch.nn.KLDivLoss(reduction="batchmean")(
            F.log_softmax(x / temp, dim=1), F.softmax(t / temp, dim=1)) * temp * temp
        loss.backward()
        put("kd_loss_T%d" % temp, [loss.item()])
        put("kd_grad_T%d" % temp, x.grad)
    x = s.clone().requires_grad_(True)
    loss = F.cross_entropy(x, labels)
    loss.backward()
    put("ce_loss", [loss.item()])
    put("ce_grad", x.grad)
    x = s.clone().requires_grad_(True)
    loss = F.mse_loss(x, t)
    loss.backward()
    put("mse_loss", [loss.item()])
    put("mse_grad", x.grad)


def optimizer_run(name, make_opt, gen_seed):
    """Ten steps on y = x W + b with an MSE loss; W (4, 3) and b (3)."""
    gen = torch.Generator().manual_seed(gen_seed)
    x = torch.randn(8, 4, generator=gen)
    y = torch.randn(8, 3, generator=gen)
    w = torch.randn(4, 3, generator=gen).requires_grad_(True)
    b = (torch.randn(3, generator=gen) * 0.1).requires_grad_(True)
    put(name + "_init", torch.cat([w.detach().reshape(-1), b.detach()]))
    opt = make_opt(w, b)
    grads, params = [], []
    for _ in range(10):
        opt.zero_grad()
        F.mse_loss(x @ w + b, y).backward()
        grads.append(torch.cat([w.grad.reshape(-1), b.grad]).clone())
        opt.step()
        params.append(torch.cat([w.detach().reshape(-1), b.detach()]).clone())
    put(name + "_grads", torch.stack(grads))
    put(name + "_params", torch.stack(params))


def optimizers():
    # W is decayed, b is in a group without decay (the C side flags it
    # RC_PARAM_NO_DECAY).
    def groups(w, b, wd):
        return [{"params": [w], "weight_decay": wd}, {"params": [b], "weight_decay": 0.0}]

    optimizer_run("sgd_momentum", lambda w, b: torch.optim.SGD(
        groups(w, b, 1e-2), lr=0.05, momentum=0.9, nesterov=False), 11)
    optimizer_run("sgd_nesterov", lambda w, b: torch.optim.SGD(
        groups(w, b, 1e-2), lr=0.05, momentum=0.9, nesterov=True), 12)
    optimizer_run("sgd_plain", lambda w, b: torch.optim.SGD(
        groups(w, b, 0.0), lr=0.1), 13)
    optimizer_run("adamw", lambda w, b: torch.optim.AdamW(
        groups(w, b, 0.1), lr=0.02, betas=(0.9, 0.999), eps=1e-8), 14)
    optimizer_run("adamw_betas", lambda w, b: torch.optim.AdamW(
        groups(w, b, 0.5), lr=0.01, betas=(0.8, 0.99), eps=1e-6), 15)


def clipping(gen):
    g1 = torch.randn(4, 3, generator=gen)
    g2 = torch.randn(3, generator=gen)
    put("clip_grad_in", torch.cat([g1.reshape(-1), g2]))
    p1 = torch.zeros(4, 3, requires_grad=True)
    p2 = torch.zeros(3, requires_grad=True)
    p1.grad, p2.grad = g1.clone(), g2.clone()
    norm = torch.nn.utils.clip_grad_norm_([p1, p2], max_norm=0.5)
    put("clip_norm", [norm.item()])
    put("clip_grad_out", torch.cat([p1.grad.reshape(-1), p2.grad]))


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: ref_train.py OUT_DIR")
    out = sys.argv[1]
    os.makedirs(out, exist_ok=True)
    torch.set_num_threads(1)
    gen = torch.Generator().manual_seed(20240611)
    losses(gen)
    optimizers()
    clipping(gen)
    for name, arr in arrays:
        arr.tofile(os.path.join(out, name + ".f32"))
    tmp = os.path.join(out, "index.txt.tmp")
    with open(tmp, "w") as f:
        for name, arr in arrays:
            f.write("%s %d\n" % (name, arr.size))
    os.replace(tmp, os.path.join(out, "index.txt"))


if __name__ == "__main__":
    main()
