"""Benchmark: training time per epoch of each fairness method against its base,
on the same rows, in one process (goal: at most 2.0x its base).

Usage: .venv/bin/python scripts/bench_fair_training.py [--dataset adult] [--epochs 5] [--repeats 2]
"""

import argparse
import time

from evenflag.data.preprocessing import prepare
from evenflag.data.protocol import ProtocolSpec, make_split
from evenflag.data.registry import load_dataset
from evenflag.detectors.base import build_detector

METHODS = [  # (method, its base)
    ({"name": "adversarial"}, {"name": "deep_svdd"}),
    ({"name": "distribution_matching"}, {"name": "deep_svdd"}),
    ({"name": "fairod"}, {"name": "autoencoder"}),
]


def seconds_per_epoch(config, data, epochs, repeats, with_group):
    config = dict(config)
    target = config.setdefault("base", {}) if "base" in config or config["name"] in ("adversarial",
                                                                                     "distribution_matching") else config
    target.setdefault("name", "deep_svdd")
    target["epochs"] = epochs
    best = float("inf")
    for _ in range(repeats):
        detector = build_detector(config, seed=0)
        start = time.perf_counter()
        detector.fit(data.X_train, data.group_train) if with_group else detector.fit(data.X_train)
        best = min(best, (time.perf_counter() - start) / epochs)
    return best


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--dataset", default="adult")
    parser.add_argument("--epochs", type=int, default=5)
    parser.add_argument("--repeats", type=int, default=2)
    args = parser.parse_args()
    dataset = load_dataset(args.dataset)
    data = prepare(dataset, make_split(dataset, ProtocolSpec(), 0))
    print(f"{args.dataset}: {len(data.X_train):,} training rows x {data.X_train.shape[1]} features, "
          f"{args.epochs} epochs, best of {args.repeats}")
    for method, base in METHODS:
        base_time = seconds_per_epoch(base, data, args.epochs, args.repeats, with_group=False)
        method_time = seconds_per_epoch(method, data, args.epochs, args.repeats, with_group=True)
        note = " (includes training its plain base once)" if method["name"] == "fairod" else ""
        print(f"{method['name']:<22} {method_time:.3f} s/epoch  {base['name']:<12} {base_time:.3f} s/epoch  "
              f"ratio {method_time / base_time:.2f}x{note}")


if __name__ == "__main__":
    main()
