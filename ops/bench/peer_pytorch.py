#!/usr/bin/env python3
"""Peer figure for examples/bench_train.rs: the same 16-H-H-1 network on the
same kind of synthetic rows (16 standard-normal inputs,
y = sin(x0) + x1*x2 - 0.5*x3 + 0.3*|x4| + 0.1*noise, standardised), the same
batch size, Adam and MSE, trained with PyTorch on the CPU. Prints the median
training rows/s per epoch next to a plain-Python reference measured in the
same run (one epoch of the same batches through NumPy's matmul, forward
only), so the absolute figure can be read against this machine's speed.

Not part of CI; needs torch (and numpy). Without torch it says so and
exits 0.

    python3 ops/bench/peer_pytorch.py [--rows 100000] [--epochs 7]
        [--batch 256] [--hidden 64] [--threads 1] [--act relu|tanh]
"""

import argparse
import statistics
import sys
import time


def make_rows(n, seed):
    import numpy as np

    rng = np.random.default_rng(seed)
    x = rng.standard_normal((n, 16)).astype(np.float32)
    y = (
        np.sin(x[:, 0])
        + x[:, 1] * x[:, 2]
        - 0.5 * x[:, 3]
        + 0.3 * np.abs(x[:, 4])
        + 0.1 * rng.standard_normal(n)
    ).astype(np.float32)
    y = (y - y.mean()) / y.std()
    return x, y.reshape(-1, 1)


def numpy_forward_rate(x, hidden, batch):
    import numpy as np

    rng = np.random.default_rng(2)
    w = [
        rng.standard_normal((a, b)).astype(np.float32) * 0.1
        for a, b in [(16, hidden), (hidden, hidden), (hidden, 1)]
    ]
    start = time.perf_counter()
    for at in range(0, len(x), batch):
        h = x[at : at + batch]
        for i, m in enumerate(w):
            h = h @ m
            if i < 2:
                h = np.maximum(h, 0.0)
    return len(x) / (time.perf_counter() - start)


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=int, default=100_000)
    p.add_argument("--epochs", type=int, default=7)
    p.add_argument("--batch", type=int, default=256)
    p.add_argument("--hidden", type=int, default=64)
    p.add_argument("--threads", type=int, default=1)
    p.add_argument("--act", choices=["relu", "tanh"], default="relu")
    a = p.parse_args()
    try:
        import torch
    except ImportError:
        print("torch is not installed; no peer figure (pip install torch)")
        return 0

    torch.manual_seed(3)
    torch.set_num_threads(a.threads)
    x_np, y_np = make_rows(a.rows, 1)
    x = torch.from_numpy(x_np)
    y = torch.from_numpy(y_np)
    act = torch.nn.ReLU if a.act == "relu" else torch.nn.Tanh
    net = torch.nn.Sequential(
        torch.nn.Linear(16, a.hidden),
        act(),
        torch.nn.Linear(a.hidden, a.hidden),
        act(),
        torch.nn.Linear(a.hidden, 1),
    )
    opt = torch.optim.Adam(net.parameters(), lr=1e-3 * a.batch / 256)
    loss_fn = torch.nn.MSELoss()
    rates = []
    for _ in range(a.epochs):
        order = torch.randperm(a.rows)
        start = time.perf_counter()
        for at in range(0, a.rows, a.batch):
            idx = order[at : at + a.batch]
            opt.zero_grad(set_to_none=True)
            loss = loss_fn(net(x[idx]), y[idx])
            loss.backward()
            opt.step()
        rates.append(a.rows / (time.perf_counter() - start))
    ours = statistics.median(rates)
    ref = numpy_forward_rate(x_np, a.hidden, a.batch)
    print("| figure | value | unit | reference | reference value | ratio |")
    print("|---|---|---|---|---|---|")
    print(
        f"| pytorch {torch.__version__} {a.act} 16-{a.hidden}-{a.hidden}-1 "
        f"b{a.batch} {a.threads} thread(s) | {ours:.0f} | rows/s | "
        f"numpy forward only, same batches | {ref:.0f} | {ours / ref:.3f} |"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
