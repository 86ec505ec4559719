"""Benchmark: Deep SVDD training throughput through evenflag against a minimal
hand-written torch loop, side by side in one process on the same data.

Goals (neural issue): evenflag >= 0.9x the minimal loop at batch 256;
the adversarial variant at most 2.0x slower than its base. Also prints
throughput at batch 1024 and 4096.

Usage: .venv/bin/python scripts/bench_neural.py [--rows N] [--epochs E]
"""

import argparse
import time

import numpy as np
import torch

from evenflag.detectors.neural import AdversarialDetector, DeepSVDDDetector


def minimal_loop(X: np.ndarray, batch: int, epochs: int, seed: int = 0) -> float:
    """Samples per second of the leanest loop we could write for the same model."""
    torch.manual_seed(seed)
    net = torch.nn.Sequential(torch.nn.Linear(100, 128, bias=False), torch.nn.LeakyReLU(),
                              torch.nn.Linear(128, 64, bias=False), torch.nn.LeakyReLU(),
                              torch.nn.Linear(64, 32, bias=False))
    data = torch.from_numpy(X)
    start = time.perf_counter()
    with torch.no_grad():
        c = net(data).mean(dim=0)
    optimizer = torch.optim.Adam(net.parameters(), lr=1e-3, weight_decay=1e-6)
    for _ in range(epochs):
        order = torch.randperm(len(data))
        for i in range(0, len(data), batch):
            xb = data[order[i:i + batch]]
            loss = ((net(xb) - c) ** 2).sum(dim=1).mean()
            optimizer.zero_grad(set_to_none=True)
            loss.backward()
            optimizer.step()
    return epochs * len(data) / (time.perf_counter() - start)


def through_evenflag(make, X, groups, epochs) -> float:
    start = time.perf_counter()
    make().fit(X, groups)
    return epochs * len(X) / (time.perf_counter() - start)


def best(fn, repeat=3):
    return max(fn() for _ in range(repeat))


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=50_000)
    parser.add_argument("--epochs", type=int, default=3)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    X = rng.normal(size=(args.rows, 100)).astype(np.float32)
    groups = rng.choice(["a", "b"], args.rows)
    E = args.epochs
    print(f"{args.rows:,} rows x 100 features, {E} epochs, torch threads {torch.get_num_threads()}")
    for batch in (256, 1024, 4096):
        net = dict(hidden=[128, 64], embedding_dim=32, batch_size=batch, epochs=E, seed=0)
        bare = best(lambda: minimal_loop(X, batch, E))
        ours = best(lambda: through_evenflag(lambda: DeepSVDDDetector(**net), X, groups, E))
        line = f"batch {batch:>5}: minimal loop {bare:>9,.0f} samples/s, evenflag deep_svdd {ours:>9,.0f} samples/s = {ours / bare:.2f}x"
        if batch == 256:
            line += " (goal >= 0.9x)"
        print(line)
        for steps in (5, 2, 1):
            adv = best(lambda: through_evenflag(
                lambda: AdversarialDetector(base={"name": "deep_svdd", **net}, weight=1.0, adversary_steps=steps, seed=0),
                X, groups, E), repeat=2)
            goal = " (goal <= 2.0x)" if batch == 256 else ""
            print(f"             adversarial, {steps} adversary step(s) per batch: {adv:>9,.0f} samples/s, "
                  f"slowdown {ours / adv:.2f}x over its base{goal}")


if __name__ == "__main__":
    main()
