#!/usr/bin/python3
"""Reference values for the per-output losses, with PyTorch.

Run with Debian's python3 (python3-torch). Writes into OUT_DIR one raw
little-endian float32 file per array (<name>.f32) and index.txt with one
"<name> <count>" line per array; tests/test_output_loss_ref.c reads them.

Each loss is written from its paper's formula with the normalisation
src/train/output_loss.h states, in float64 from float32 inputs, and
differentiated by autograd:
  kd          Hinton, Vinyals and Dean 2015, KL(softmax(t/T) || softmax(s/T)) T^2
              at every position (Liu et al. 2019, pixel-wise distillation),
              optional class weights (Chen et al. 2017 weight the background)
  kd-sigmoid  binary KL per entry between sigmoid(t/T) and sigmoid(s/T), T^2
  mse         F.mse_loss
  smooth-l1   F.smooth_l1_loss with beta
  bounded-l2  Chen et al. 2017: |s - y|^2 where |s - y|^2 + m > |t - y|^2
  edge-kd     Zheng et al. 2022 (localization distillation): KL per box edge
              over its discrete bins, T^2, summed over edges
  ce          F.cross_entropy with ignore_index (dense labels)
  bnstat      synthesis' statistics term (ZeroQ, Cai et al. 2020; DeepInversion,
              Yin et al. 2020): ||mean(x) - m||_2 + ||var(x) - v||_2 per
              channel, biased variance
  prior       synthesis' priors: w_tv * mean squared neighbour difference +
              w_l2 * mean x^2
Shapes and axes are odd on purpose (class axis in the middle or last).
"""
import os
import sys

import torch
import torch.nn.functional as F

# The array writer and float32 draws of the feature-term references (same folder).
from ref_feature_loss import arrays, put, rand


def kd(s, t, axis, T, w=None):
    lt = F.log_softmax(t / T, dim=axis)
    ls = F.log_softmax(s / T, dim=axis)
    kl = lt.exp() * (lt - ls)
    if w is not None:
        shape = [1] * s.dim()
        shape[axis] = -1
        kl = kl * w.view(shape)
    return kl.sum(dim=axis).mean() * T * T


def kd_sigmoid(s, t, T):
    lps, lqs = F.logsigmoid(s / T), F.logsigmoid(-s / T)
    lpt, lqt = F.logsigmoid(t / T), F.logsigmoid(-t / T)
    return (lpt.exp() * (lpt - lps) + lqt.exp() * (lqt - lqs)).mean() * T * T


def bounded_l2(s, t, y, axis, m):
    valid = ~torch.isnan(y).any(dim=axis)
    yz = torch.nan_to_num(y)
    es = ((s - yz) ** 2).sum(dim=axis)
    et = ((t - yz) ** 2).sum(dim=axis)
    active = valid & ((es + m) > et)
    return (es * active.double()).sum() / valid.sum()


def edge_kd(s, t, axis, bins, T):
    shape = list(s.shape)
    k = shape[axis]
    split = shape[:axis] + [k // bins, bins] + shape[axis + 1:]
    ss, tt = s.reshape(split), t.reshape(split)
    lt = F.log_softmax(tt / T, dim=axis + 1)
    ls = F.log_softmax(ss / T, dim=axis + 1)
    kl = (lt.exp() * (lt - ls)).sum(dim=axis + 1).sum(dim=axis)
    return kl.mean() * T * T


def case(name, fn, s, t, extra=()):
    sl = s.clone().requires_grad_(True)
    loss = fn(sl, t, *extra)
    loss.backward()
    put(name + "_s", s)
    put(name + "_t", t)
    put(name + "_loss", loss.reshape(1))
    put(name + "_g", sl.grad)


def main():
    out = sys.argv[1]
    os.makedirs(out, exist_ok=True)
    gen = torch.Generator().manual_seed(14)
    # kd over axis 1 of (3, 5, 4, 7), T = 2; the same with class weights.
    s, t = rand(gen, 3, 5, 4, 7, scale=3), rand(gen, 3, 5, 4, 7, scale=3)
    case("kd_axis1", lambda a, b: kd(a, b, 1, 2.0), s, t)
    w = torch.tensor([0.25, 1.0, 2.0, 0.5, 1.5], dtype=torch.float64)
    put("kd_weights", w)
    case("kd_weighted", lambda a, b: kd(a, b, 1, 2.0, w), s, t)
    # kd over the last axis of (2, 3, 6) (a token classifier), T = 1.
    s, t = rand(gen, 2, 3, 6, scale=2), rand(gen, 2, 3, 6, scale=2)
    case("kd_last", lambda a, b: kd(a, b, 2, 1.0), s, t)
    # kd-sigmoid on (3, 4, 5), T = 1.5; large logits too.
    s, t = rand(gen, 3, 4, 5, scale=6), rand(gen, 3, 4, 5, scale=6)
    case("kds", lambda a, b: kd_sigmoid(a, b, 1.5), s, t)
    # mse and smooth-l1 (beta 0.5) on (2, 7, 3).
    s, t = rand(gen, 2, 7, 3), rand(gen, 2, 7, 3)
    case("mse", lambda a, b: F.mse_loss(a, b), s, t)
    case("sl1", lambda a, b: F.smooth_l1_loss(a, b, beta=0.5), s, t)
    # bounded-l2 on (3, 4, 5) boxes on axis 1 (4 coordinates), margin 0.1,
    # targets missing at two positions (NaN).
    s, t, y = rand(gen, 3, 4, 5), rand(gen, 3, 4, 5), rand(gen, 3, 4, 5)
    y[0, :, 2] = float("nan")
    y[2, :, 4] = float("nan")
    put("bl2_y", y)
    case("bl2", lambda a, b: bounded_l2(a, b, y, 1, 0.1), s, t)
    # edge-kd on (2, 3, 4*5): 4 edges of 5 bins on the last axis, T = 3.
    s, t = rand(gen, 2, 3, 20, scale=2), rand(gen, 2, 3, 20, scale=2)
    case("ekd", lambda a, b: edge_kd(a, b, 2, 5, 3.0), s, t)
    # dense cross-entropy on (2, 4, 3, 5), class axis 1, ignore 255.
    s = rand(gen, 2, 4, 3, 5, scale=2)
    lab = torch.randint(0, 4, (2, 3, 5), generator=gen)
    lab[0, 1, 2] = 255
    lab[1, 2, 0] = 255
    sl = s.clone().requires_grad_(True)
    loss = F.cross_entropy(sl, lab, ignore_index=255)
    loss.backward()
    put("ce_s", s)
    put("ce_labels", lab.double())
    put("ce_loss", loss.reshape(1))
    put("ce_g", sl.grad)
    # Synthesis terms on (3, 4, 5, 6): channel statistics against stored ones.
    x = rand(gen, 3, 4, 5, 6, scale=1.5)
    rm, rv = rand(gen, 4), rand(gen, 4).abs() + 0.5
    xl = x.clone().requires_grad_(True)
    mu, var = xl.mean(dim=(0, 2, 3)), xl.var(dim=(0, 2, 3), unbiased=False)
    loss = torch.linalg.norm(mu - rm) + torch.linalg.norm(var - rv)
    loss.backward()
    put("bnstat_x", x)
    put("bnstat_m", rm)
    put("bnstat_v", rv)
    put("bnstat_loss", loss.reshape(1))
    put("bnstat_g", xl.grad)
    xl = x.clone().requires_grad_(True)
    dx, dy = xl[..., 1:] - xl[..., :-1], xl[..., 1:, :] - xl[..., :-1, :]
    tv = (dx.pow(2).sum() + dy.pow(2).sum()) / (dx.numel() + dy.numel())
    loss = 0.05 * tv + 0.001 * xl.pow(2).mean()
    loss.backward()
    put("prior_loss", loss.reshape(1))
    put("prior_g", xl.grad)
    for name, arr in arrays:
        arr.tofile(os.path.join(out, name + ".f32"))
    with open(os.path.join(out, "index.txt"), "w") as f:
        for name, arr in arrays:
            f.write("%s %d\n" % (name, arr.size))


if __name__ == "__main__":
    main()
