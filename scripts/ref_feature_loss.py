#!/usr/bin/python3
"""Reference values for the feature-level distillation losses, with PyTorch.

Run with Debian's python3 (python3-torch). Writes into OUT_DIR one raw
little-endian float32 file per array (<name>.f32) and index.txt with one
"<name> <count>" line per array; tests/test_feature_loss_ref.c reads them.

Each loss below is written from its paper's formula (the normalisation
recoup documents in src/train/feature_loss.h), computed in float64 from
float32 inputs, and differentiated by autograd:
  hint       Romero et al. 2015 (FitNets): MSE between the teacher feature
             and a 1x1-conv / linear projection of the student feature
  boundary   Heo et al. 2019 (activation-boundary transfer): hinge
             rho(t) relu(mu - s)^2 + (1 - rho(t)) relu(mu + s)^2
  attention  Zagoruyko and Komodakis 2017 (attention transfer):
             beta/2 || q_s/||q_s|| - q_t/||q_t|| ||_2, q = sum_c A_c^2
  fsp        Yim et al. 2017: || G_s - G_t ||_F^2, G = F1 F2^T / (h w)
  rkd        Park et al. 2019 (relational KD): distance and angle
             potentials under smooth L1 (Huber, delta 1)
  attnmap    KL(teacher || student) over attention probabilities
  anchor     L2-SP penalty (Li, Grandvalet and Davoine 2018), masked
  fit        least-squares (ridge) start of a projector: the normal
             equations of [s, 1] -> t solved by torch.linalg.solve
"""
import itertools
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


def rand(gen, *shape, scale=1.0):
    """float32 values, returned as float64 leaves so autograd runs in double."""
    x = (torch.randn(*shape, generator=gen) * scale).float()
    return x.double()


def leaf(x):
    return x.clone().requires_grad_(True)


def project(s, w, b, channels_first):
    """1x1 convolution (channels first) or linear layer on the last axis."""
    if w is None:
        return s
    if channels_first:
        return F.conv2d(s, w.view(w.shape[0], w.shape[1], 1, 1), b)
    return F.linear(s, w, b)


def hint_loss(y, t):
    # FitNets (Romero et al. 2015): squared distance between the teacher
    # hint and the regressor's output; recoup takes the mean over elements.
    return F.mse_loss(y, t)


def boundary_loss(y, t, mu):
    # Heo et al. 2019, activation-boundary transfer, mean over elements.
    rho = (t > 0).double()
    return (rho * F.relu(mu - y) ** 2 + (1 - rho) * F.relu(mu + y) ** 2).mean()


def projected_case(name, gen, kind, s_shape, ct, channels_first, projector=True, mu=1.0,
                   s_scale=1.0, t_scale=1.0):
    cs = s_shape[1] if channels_first else s_shape[-1]
    s = rand(gen, *s_shape, scale=s_scale)
    if channels_first:
        t_shape = (s_shape[0], ct) + tuple(s_shape[2:])
    else:
        t_shape = tuple(s_shape[:-1]) + (ct,)
    t = rand(gen, *t_shape, scale=t_scale)
    w = rand(gen, ct, cs, scale=1.0 / np.sqrt(cs)) if projector else None
    b = rand(gen, ct, scale=0.1) if projector else None
    xs = leaf(s)
    xw = leaf(w) if projector else None
    xb = leaf(b) if projector else None
    y = project(xs, xw, xb, channels_first)
    loss = hint_loss(y, t) if kind == "hint" else boundary_loss(y, t, mu)
    loss.backward()
    put(name + "_s", s)
    put(name + "_t", t)
    put(name + "_loss", [loss.item()])
    put(name + "_gs", xs.grad)
    if projector:
        put(name + "_w", w)
        put(name + "_b", b)
        put(name + "_gw", xw.grad)
        put(name + "_gb", xb.grad)


def attention_case(name, gen, s_shape, t_shape, beta, channels_first):
    # Zagoruyko and Komodakis 2017: Q = vec(sum_c |A_c|^2), loss
    # beta/2 || Q_s/||Q_s||_2 - Q_t/||Q_t||_2 ||_2 (the p-norm with p = 2 as the
    # paper writes it, not squared); mean over the batch.
    s = rand(gen, *s_shape)
    t = rand(gen, *t_shape)
    xs = leaf(s)
    cdim = 1 if channels_first else -1

    def amap(a):
        return F.normalize(a.pow(2).sum(cdim).reshape(a.shape[0], -1), p=2, dim=1)

    loss = (beta / 2 * (amap(xs) - amap(t)).norm(p=2, dim=1)).mean()
    loss.backward()
    put(name + "_s", s)
    put(name + "_t", t)
    put(name + "_loss", [loss.item()])
    put(name + "_gs", xs.grad)


def fsp_case(name, gen, n, c1, c2, ps, pt, channels_first):
    # Yim et al. 2017: G = sum over positions of F1^T F2 / (h w), loss the
    # squared L2 (Frobenius) norm of G_s - G_t, mean over the batch.
    def feat(c, p):
        return rand(gen, n, c, p) if channels_first else rand(gen, n, p, c)

    s1, s2, t1, t2 = feat(c1, ps), feat(c2, ps), feat(c1, pt), feat(c2, pt)
    x1, x2 = leaf(s1), leaf(s2)

    def gram(a, b):
        if not channels_first:
            a, b = a.transpose(1, 2), b.transpose(1, 2)
        return torch.bmm(a, b.transpose(1, 2)) / a.shape[2]

    loss = ((gram(x1, x2) - gram(t1, t2)) ** 2).sum(dim=(1, 2)).mean()
    loss.backward()
    for k, v in (("s1", s1), ("s2", s2), ("t1", t1), ("t2", t2)):
        put(name + "_" + k, v)
    put(name + "_loss", [loss.item()])
    put(name + "_gs1", x1.grad)
    put(name + "_gs2", x2.grad)


def rkd_distance(e):
    # Park et al. 2019: psi_D = ||e_i - e_j|| / mu, mu the mean over distinct
    # pairs; every ordered pair i != j.
    n = e.shape[0]
    i, j = zip(*[(a, b) for a in range(n) for b in range(n) if a != b])
    d = (e[list(i)] - e[list(j)]).norm(p=2, dim=1)
    return d / d.mean()


def rkd_angle(e):
    # Park et al. 2019: psi_A = <e^{ij}, e^{kj}>, e^{ij} = (t_i - t_j) /
    # ||t_i - t_j||: the cosine of the angle at j; every distinct triple.
    n = e.shape[0]
    idx = [(i, j, k) for i, j, k in itertools.product(range(n), repeat=3)
           if i != j and k != j and i != k]
    i, j, k = (list(v) for v in zip(*idx))
    u = F.normalize(e[i] - e[j], p=2, dim=1)
    v = F.normalize(e[k] - e[j], p=2, dim=1)
    return (u * v).sum(1)


def rkd_case(name, gen, n, ds, dt):
    s = rand(gen, n, ds)
    t = rand(gen, n, dt)
    # One far-off student sample so some distance differences pass 1 and
    # both branches of the Huber loss are exercised.
    s[0] *= 6.0
    put(name + "_s", s)
    put(name + "_t", t)
    for kind, fn in (("dist", rkd_distance), ("angle", rkd_angle)):
        x = leaf(s)
        loss = F.smooth_l1_loss(fn(x), fn(t), beta=1.0)
        loss.backward()
        put(name + "_" + kind + "_loss", [loss.item()])
        put(name + "_" + kind + "_gs", x.grad)


def attnmap_case(name, gen, n, h, lq, lk, eps=1e-8):
    s = torch.softmax(rand(gen, n, h, lq, lk, scale=2.0), dim=-1).float().double()
    t = torch.softmax(rand(gen, n, h, lq, lk, scale=3.0), dim=-1).float().double()
    # A teacher zero (0 log 0 = 0) and a student zero (clamped at eps).
    t[0, 0, 0, 1] = 0.0
    s[0, 1, 2, 3] = 0.0
    x = leaf(s)
    kl = torch.xlogy(t, t) - t * torch.log(torch.clamp(x, min=eps))
    loss = kl.sum(-1).mean()
    loss.backward()
    put(name + "_s", s)
    put(name + "_t", t)
    put(name + "_loss", [loss.item()])
    put(name + "_gs", x.grad)


def anchor_case(name, gen, count):
    # L2-SP (Li, Grandvalet and Davoine 2018): 1/2 sum m (w - w0)^2.
    w = rand(gen, count)
    w0 = rand(gen, count)
    m = (torch.rand(count, generator=gen) > 0.3).double()
    x = leaf(w)
    loss = 0.5 * (m * (x - w0) ** 2).sum()
    loss.backward()
    put(name + "_s", w)
    put(name + "_t", w0)
    put(name + "_mask", m)
    put(name + "_loss", [loss.item()])
    put(name + "_gs", x.grad)


def fit_case(name, gen, s_shape, ct, channels_first, ridge=0.1):
    """Ridge regression from student to teacher channels over every sample
    and position: minimise |W s + b - t|^2 + lam |W|^2 with lam = ridge *
    trace(S^T S) / Cs (b not penalised)."""
    cs = s_shape[1] if channels_first else s_shape[-1]
    s = rand(gen, *s_shape)
    w0 = rand(gen, ct, cs)
    t = project(s, w0, rand(gen, ct), channels_first)
    t = (t + rand(gen, *t.shape, scale=0.3)).float().double()  # noise: no exact fit
    rows_s = s.movedim(1, -1).reshape(-1, cs) if channels_first else s.reshape(-1, cs)
    rows_t = t.movedim(1, -1).reshape(-1, ct) if channels_first else t.reshape(-1, ct)
    x = torch.cat([rows_s, torch.ones(rows_s.shape[0], 1, dtype=torch.float64)], 1)
    lam = ridge * torch.trace(rows_s.T @ rows_s) / cs
    penalty = torch.diag(torch.cat([torch.full((cs,), float(lam), dtype=torch.float64),
                                    torch.zeros(1, dtype=torch.float64)]))
    theta = torch.linalg.solve(x.T @ x + penalty, x.T @ rows_t)  # (cs + 1, ct)
    put(name + "_s", s)
    put(name + "_t", t)
    put(name + "_w", theta[:cs].T)
    put(name + "_b", theta[cs])


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: ref_feature_loss.py OUT_DIR")
    out = sys.argv[1]
    os.makedirs(out, exist_ok=True)
    torch.set_num_threads(1)
    gen = torch.Generator().manual_seed(20240717)
    projected_case("hint_cf", gen, "hint", (3, 4, 3, 2), 5, True)
    projected_case("hint_tok", gen, "hint", (2, 3, 4), 3, False)
    projected_case("hint_vec", gen, "hint", (4, 6), 5, False)
    projected_case("hint_same", gen, "hint", (2, 3, 2, 2), 3, True, projector=False)
    projected_case("ab_cf", gen, "boundary", (3, 4, 3, 2), 5, True, mu=1.0)
    projected_case("ab_tok", gen, "boundary", (2, 3, 4), 3, False, mu=0.5, s_scale=2.0)
    projected_case("ab_same", gen, "boundary", (2, 3, 2, 2), 3, True, projector=False, mu=1.0)
    attention_case("at_cf", gen, (3, 4, 5, 4), (3, 6, 5, 4), 1000.0, True)
    attention_case("at_tok", gen, (2, 7, 5), (2, 7, 3), 10.0, False)
    fsp_case("fsp_cf", gen, 2, 3, 5, 16, 4, True)
    fsp_case("fsp_tok", gen, 3, 4, 2, 6, 5, False)
    rkd_case("rkd", gen, 7, 5, 9)
    attnmap_case("attnmap", gen, 2, 3, 4, 5)
    anchor_case("anchor", gen, 40)
    fit_case("fit_cf", gen, (3, 4, 5, 2), 6, True)
    fit_case("fit_tok", gen, (2, 9, 5), 3, False)
    for name, arr in arrays:
        arr.tofile(os.path.join(out, name + ".f32"))
    tmp = os.path.join(out, "index.txt.tmp")
    with open(tmp, "w") as f:
        for name, arr in arrays:
            f.write("%s %d\n" % (name, arr.size))
    os.replace(tmp, os.path.join(out, "index.txt"))


if __name__ == "__main__":
    main()
