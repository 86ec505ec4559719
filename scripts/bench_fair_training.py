"""Benchmark: training time per epoch of each fairness method against its base,
on the same rows, in one process (goal: at most 2.0x its base).

Base and method are timed in turn (base, method, base, method, ...) and the
best of each is kept, so that a slow spell of the machine hits both; torch runs
with one thread (``--threads``), as each job of a parallel sweep does.

Usage: .venv/bin/python scripts/bench_fair_training.py [--dataset adult] [--epochs 5] [--repeats 3]
       [--threads 1] [--methods adversarial,distribution_matching,fairod]
"""

import argparse
import time

import torch

from evenflag.data.preprocessing import prepare
from evenflag.data.protocol import ProtocolSpec, make_split
from evenflag.data.registry import load_dataset
from evenflag.detectors.base import build_detector

METHODS = [  # (method, its base)
    ({"name": "adversarial"}, {"name": "deep_svdd"}),
    ({"name": "distribution_matching"}, {"name": "deep_svdd"}),
    ({"name": "fairod"}, {"name": "autoencoder"}),
]


def seconds_per_epoch(config, data, epochs, with_group):
    config = dict(config)
    target = config.setdefault("base", {}) if "base" in config or config["name"] in ("adversarial",
                                                                                     "distribution_matching") else config
    target.setdefault("name", "deep_svdd")
    target["epochs"] = epochs
    detector = build_detector(config, seed=0)
    start = time.perf_counter()
    detector.fit(data.X_train, data.group_train) if with_group else detector.fit(data.X_train)
    return (time.perf_counter() - start) / epochs


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--dataset", default="adult")
    parser.add_argument("--epochs", type=int, default=5)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--methods", default=",".join(m["name"] for m, _ in METHODS), help="comma-separated")
    args = parser.parse_args()
    unknown = set(args.methods.split(",")) - {m["name"] for m, _ in METHODS}
    if unknown:
        raise SystemExit(f"--methods: unknown {', '.join(sorted(unknown))}; "
                         f"choose from {', '.join(m['name'] for m, _ in METHODS)}")
    torch.set_num_threads(args.threads)
    dataset = load_dataset(args.dataset)
    data = prepare(dataset, make_split(dataset, ProtocolSpec(), 0))
    print(f"{args.dataset}: {len(data.X_train):,} training rows x {data.X_train.shape[1]} features, "
          f"{args.epochs} epochs, best of {args.repeats}, {args.threads} torch thread(s)")
    for method, base in (pair for pair in METHODS if pair[0]["name"] in args.methods.split(",")):
        base_time, method_time = float("inf"), float("inf")
        for _ in range(args.repeats):
            base_time = min(base_time, seconds_per_epoch(base, data, args.epochs, with_group=False))
            method_time = min(method_time, seconds_per_epoch(method, data, args.epochs, with_group=True))
        note = ""
        if method["name"] == "fairod":
            # FairOD first trains its plain base (the same autoencoder, same epochs) once;
            # its own epochs are the rest of the time
            own = (method_time - base_time) / base_time
            note = f" (includes training its plain base once; its own epochs {own:.2f}x)"
        print(f"{method['name']:<22} {method_time:.3f} s/epoch  {base['name']:<12} {base_time:.3f} s/epoch  "
              f"ratio {method_time / base_time:.2f}x{note}")


if __name__ == "__main__":
    main()
