#!/usr/bin/env python3
"""Makes tests/reference/edgeconv_fixture.json: a tiny EdgeConv classifier (the layout of
partsift's `edgeconv` network with its size-aware head) run by PyTorch autograd, for the Rust
test `net::model::tests::matches_pytorch_autograd_on_the_reference_fixture`.

Run with torch 2.15.0 and numpy 2.4.6 (CPU), from the crate root:
    ~/.peer-venv/bin/python tests/reference/make_edgeconv_fixture.py
Not run in CI: only its output is read. Set-up: python3 -m venv ~/.peer-venv &&
~/.peer-venv/bin/pip install torch numpy

The network, written from Wang et al. 2019 and our head: 4 EdgeConv layers (edge feature
[x_i, x_j - x_i], linear without bias, batch norm over all edges, LeakyReLU 0.2, max over the k
neighbours; neighbours by squared distance in the layer's input features, the point itself
first), their outputs joined, a linear + BN + LeakyReLU embedding, global max and mean pooling
joined, a size branch (linear 4 -> S + BN + LeakyReLU) joined, then FC (no bias) + BN + LeakyReLU
+ dropout, FC (bias) + BN + LeakyReLU + dropout, FC (bias). Dropout masks are drawn here and
stored, so both sides drop the same values.

Stored: the inputs, every tensor (partsift's names), the masks, each layer's neighbours;
evaluation-mode logits and the saliency (d logit / d points) of one cloud with the running
statistics given; then one training step: logits, loss (label smoothing 0.2), the gradient of
every parameter and the running statistics after it. Also short SGD and Adam trajectories of
torch.optim on a small vector, for the optimisers.
"""
import json
import os

import numpy as np
import torch
import torch.nn.functional as F

N, K, B = 32, 4, 3
TRUNK = [4, 4, 6, 8]
EMBED, HEAD, SIZE, CLASSES = 12, [10, 8], 4, 3
DROPOUT, SMOOTHING, SLOPE, EPS, MOMENTUM = 0.5, 0.2, 0.2, 1e-5, 0.1
LABELS = [0, 2, 1]
SALIENCY_SAMPLE, SALIENCY_CLASS = 1, 2
# The (k+1)-th neighbour must be at least this much (relative) further than the k-th, in every
# layer, so that f32 rounding on either side cannot change a neighbour set.
MARGIN = 1e-3


def knn(x):
    """x: (B, N, C) -> (B, N, K) indices, the point itself first, then by distance."""
    inner = x @ x.transpose(1, 2)
    sq = (x * x).sum(-1, keepdim=True)
    d = sq - 2 * inner + sq.transpose(1, 2)
    d = d - torch.diag_embed(torch.full((x.shape[0], x.shape[1]), float("inf")))
    return d.topk(K, dim=-1, largest=False).indices


def margins_ok(x):
    """Exact (float64) distances of the float32 features: gap between k-th and (k+1)-th."""
    x = x.detach().double()
    d = ((x[:, :, None, :] - x[:, None, :, :]) ** 2).sum(-1)
    s = d.sort(dim=-1).values  # s[..., 0] is the point itself (0)
    gap = (s[..., K] - s[..., K - 1]) / (s[..., K] + 1e-12)
    return bool((gap > MARGIN).all())


def batch_norm(x, p, name, train, running):
    """x: (rows, C) over all rows of the batch, PyTorch's F.batch_norm."""
    rm, rv = running[name + ".running_mean"], running[name + ".running_var"]
    return F.batch_norm(x, rm, rv, p[name + ".weight"], p[name + ".bias"], train, MOMENTUM, EPS)


def forward(points, size, p, running, train, masks, record=None):
    x = points  # (B, N, 3)
    outs = []
    for i in range(len(TRUNK)):
        idx = knn(x.detach())
        if not margins_ok(x):
            raise ValueError("neighbour margin")
        if record is not None:
            record.append(idx.reshape(-1).tolist())
        c = x.shape[-1]
        xj = torch.stack([x[b][idx[b]] for b in range(x.shape[0])])  # (B, N, K, C)
        xi = x[:, :, None, :].expand(-1, -1, K, -1)
        e = torch.cat((xi, xj - xi), dim=-1).reshape(-1, 2 * c)  # rows: (b, i, j)
        y = e @ p[f"edge{i}.linear.weight"].T
        y = F.leaky_relu(batch_norm(y, p, f"edge{i}.norm", train, running), SLOPE)
        x = y.reshape(x.shape[0], N, K, -1).amax(dim=2)
        outs.append(x)
    h = torch.cat(outs, dim=-1).reshape(-1, sum(TRUNK)) @ p["embed.linear.weight"].T
    h = F.leaky_relu(batch_norm(h, p, "embed.norm", train, running), SLOPE).reshape(-1, N, EMBED)
    pooled = torch.cat((h.amax(dim=1), h.mean(dim=1)), dim=-1)
    s = size @ p["head.size.linear.weight"].T
    s = F.leaky_relu(batch_norm(s, p, "head.size.norm", train, running), SLOPE)
    f = torch.cat((pooled, s), dim=-1)
    f = F.leaky_relu(batch_norm(f @ p["head.fc1.linear.weight"].T, p, "head.fc1.norm", train, running), SLOPE)
    if masks is not None:
        f = f * masks[0]
    f = f @ p["head.fc2.linear.weight"].T + p["head.fc2.linear.bias"]
    f = F.leaky_relu(batch_norm(f, p, "head.fc2.norm", train, running), SLOPE)
    if masks is not None:
        f = f * masks[1]
    return f @ p["head.out.weight"].T + p["head.out.bias"]


def make_params(gen):
    p, running = {}, {}

    def linear(name, i, o, bias):
        bound = 1.0 / np.sqrt(i)
        p[name + ".weight"] = (torch.rand(o, i, generator=gen) * 2 - 1) * bound
        if bias:
            p[name + ".bias"] = (torch.rand(o, generator=gen) * 2 - 1) * bound

    def norm(name, c):
        # Scales and shifts away from 1 and 0 so that their gradients are tested too.
        p[name + ".weight"] = 0.5 + torch.rand(c, generator=gen)
        p[name + ".bias"] = 0.3 * torch.randn(c, generator=gen)
        running[name + ".running_mean"] = 0.2 * torch.randn(c, generator=gen)
        running[name + ".running_var"] = 0.5 + torch.rand(c, generator=gen)

    c = 3
    for i, w in enumerate(TRUNK):
        linear(f"edge{i}.linear", 2 * c, w, False)
        norm(f"edge{i}.norm", w)
        c = w
    linear("embed.linear", sum(TRUNK), EMBED, False)
    norm("embed.norm", EMBED)
    linear("head.size.linear", 4, SIZE, False)
    norm("head.size.norm", SIZE)
    linear("head.fc1.linear", 2 * EMBED + SIZE, HEAD[0], False)
    norm("head.fc1.norm", HEAD[0])
    linear("head.fc2.linear", HEAD[0], HEAD[1], True)
    norm("head.fc2.norm", HEAD[1])
    linear("head.out", HEAD[1], CLASSES, True)
    return p, running


def clouds(gen):
    axes = 0.4 + 0.6 * torch.rand(B, 1, 3, generator=gen)
    v = torch.randn(B, N, 3, generator=gen)
    v = v / v.norm(dim=-1, keepdim=True)
    return v * axes + 0.05 * torch.randn(B, N, 3, generator=gen)


def flat(t):
    return [float(v) for v in t.detach().reshape(-1).tolist()]


def optimiser_trajectories(gen):
    """Three steps of torch.optim.SGD (momentum 0.9, weight decay 1e-4) and Adam (weight decay
    1e-4) on a vector of 6, with given gradients and learning rates."""
    start = torch.randn(6, generator=gen)
    grads = [torch.randn(6, generator=gen) for _ in range(3)]
    lrs = [0.1, 0.05, 0.02]
    out = {"start": flat(start), "grads": [flat(g) for g in grads], "lrs": lrs}
    for name, make in (("sgd", lambda q: torch.optim.SGD([q], lr=0.1, momentum=0.9, weight_decay=1e-4)),
                       ("adam", lambda q: torch.optim.Adam([q], lr=0.1, weight_decay=1e-4))):
        q = torch.nn.Parameter(start.clone())
        opt = make(q)
        after = []
        for g, lr in zip(grads, lrs):
            for group in opt.param_groups:
                group["lr"] = lr
            q.grad = g.clone()
            opt.step()
            after.append(flat(q))
        out[name] = after
    return out


def main():
    torch.set_num_threads(1)
    for seed in range(100):
        gen = torch.Generator().manual_seed(seed)
        p, running0 = make_params(gen)
        points = clouds(gen)
        size = 3.0 + torch.randn(B, 4, generator=gen)
        masks = [(torch.rand(B, w, generator=gen) >= DROPOUT).float() / (1 - DROPOUT) for w in HEAD]
        neighbours = []
        try:
            with torch.no_grad():
                forward(points, size, p, {k: v.clone() for k, v in running0.items()}, True, masks, neighbours)
                forward(points, size, p, running0, False, None)  # evaluation mode: other graphs
        except ValueError:
            continue
        break
    else:
        raise SystemExit("no seed gave clear neighbour margins")

    # Evaluation mode: logits of the batch, saliency of one cloud.
    with torch.no_grad():
        eval_logits = forward(points, size, p, running0, False, None)
    one = points[SALIENCY_SAMPLE:SALIENCY_SAMPLE + 1].clone().requires_grad_(True)
    logit = forward(one, size[SALIENCY_SAMPLE:SALIENCY_SAMPLE + 1], p, running0, False, None)[0, SALIENCY_CLASS]
    (saliency,) = torch.autograd.grad(logit, one)

    # One training step.
    params = {k: v.clone().requires_grad_(True) for k, v in p.items()}
    running = {k: v.clone() for k, v in running0.items()}
    logits = forward(points, size, params, running, True, masks)
    loss = F.cross_entropy(logits, torch.tensor(LABELS), label_smoothing=SMOOTHING)
    loss.backward()

    fixture = {
        "made_by": "tests/reference/make_edgeconv_fixture.py",
        "torch": torch.__version__,
        "numpy": np.__version__,
        "seed": seed,
        "dims": {"points": N, "k": K, "trunk": TRUNK, "embed": EMBED, "head": HEAD, "size": SIZE,
                 "dropout": DROPOUT, "classes": CLASSES},
        "labels": LABELS,
        "smoothing": SMOOTHING,
        "points": flat(points),
        "size": flat(size),
        "params": {k: flat(v) for k, v in sorted(p.items())},
        "running": {k: flat(v) for k, v in sorted(running0.items())},
        "masks": [flat(m) for m in masks],
        "neighbours": neighbours,
        "eval": {"logits": flat(eval_logits), "saliency_sample": SALIENCY_SAMPLE,
                 "saliency_class": SALIENCY_CLASS, "saliency": flat(saliency)},
        "train": {"logits": flat(logits), "loss": float(loss.detach()),
                  "grads": {k: flat(v.grad) for k, v in sorted(params.items())},
                  "running_after": {k: flat(v) for k, v in sorted(running.items())}},
        "optim": optimiser_trajectories(torch.Generator().manual_seed(1000)),
    }
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "edgeconv_fixture.json")
    with open(path, "w") as f:
        json.dump(fixture, f, indent=None, separators=(",", ":"))
        f.write("\n")
    print(f"wrote {path} (seed {seed}, loss {float(loss.detach()):.6f})")


if __name__ == "__main__":
    main()
