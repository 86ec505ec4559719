"""Coverage of evenflag's 95% intervals, by simulation with a known truth.

A population of two groups (70% / 30%) whose anomaly base rates and score laws
are set per scenario; each replication draws n test rows independently from
it (the case of a user reporting on "people like these"), flags the top 5% of
scores (the runner's default policy) or applies a fixed cut, and asks
``evaluate`` for intervals. The truth of each key is computed on 4 million
rows of the same population. Prints, per scenario and key, the share of
replications whose interval contained the truth.

    .venv/bin/python scripts/sim_coverage.py [--reps 1000] [--n 2000] [--schemes rows,strata] [--scenarios 1,2]
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np

from evenflag.metrics.inputs import FlagRule
from evenflag.metrics.suites import evaluate

SCENARIOS = {
    # name: (base rate a, base rate b, score shift of b, policy)
    "parity, top 5%": (0.05, 0.05, 0.0, "top"),
    "off parity, top 5%": (0.05, 0.10, 0.5, "top"),
    "off parity, fixed cut": (0.05, 0.10, 0.5, "fixed"),
    "base rates 5%/10%, same score law, top 5%": (0.05, 0.10, 0.0, "top"),
}
KEYS = ["flag_rate_diff/b", "flag_rate_vs_reference/b", "false_flag_diff/b", "hit_rate_diff/b", "score_shift/b",
        "auroc", "auroc_diff/b", "flag_rate/b"]


def draw(rng, n, rate_a, rate_b, shift):
    b = rng.random(n) < 0.3
    label = (rng.random(n) < np.where(b, rate_b, rate_a)).astype(int)
    score = rng.normal(size=n) + 1.5 * label + shift * b
    return label, score, np.where(b, "b", "a")


def truth(rate_a, rate_b, shift, q=0.05, seed=99):
    from sklearn.metrics import roc_auc_score

    rng = np.random.default_rng(seed)
    label, score, group = draw(rng, 4_000_000, rate_a, rate_b, shift)
    cut = np.quantile(score, 1 - q)
    flag = score > cut
    a, b = group == "a", group == "b"
    rate = lambda m: flag[m].mean()
    pooled = np.searchsorted(np.sort(score), score, side="right") / len(score)
    sub = slice(0, 1_000_000)
    auc = lambda m: roc_auc_score(label[sub][m[sub]], score[sub][m[sub]])
    return cut, {
        "flag_rate_diff/b": rate(b) - rate(a),
        "flag_rate_vs_reference/b": rate(b) / rate(a),
        "false_flag_diff/b": rate(b & (label == 0)) - rate(a & (label == 0)),
        "hit_rate_diff/b": rate(b & (label == 1)) - rate(a & (label == 1)),
        "score_shift/b": pooled[b].mean() - pooled[a].mean(),
        "auroc": roc_auc_score(label[sub], score[sub]),
        "auroc_diff/b": auc(b) - auc(a),
        "flag_rate/b": rate(b),
    }


def coverage(name, reps, n, resample, seed=0):
    rate_a, rate_b, shift, policy = SCENARIOS[name]
    cut, true = truth(rate_a, rate_b, shift)
    rng = np.random.default_rng(seed)
    hits = {k: 0 for k in KEYS}
    marked = 0
    for rep in range(reps):
        label, score, group = draw(rng, n, rate_a, rate_b, shift)
        if policy == "top":
            k = int(round(0.05 * n))
            flag = score >= np.partition(score, n - k)[n - k]
            rule = FlagRule("top_fraction", 0.05)
        else:
            flag, rule = score > cut, None
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            v = evaluate(["detection", "flag_fairness", "score_fairness"], label, score, flag, group,
                         n_bootstrap=200, seed=rep, resample=resample, rule=rule, reference_group="a").values
        marked += any(key.endswith(".ci_degenerate") for key in v)
        for key in KEYS:
            hits[key] += v[f"{key}.ci_low"] <= true[key] <= v[f"{key}.ci_high"]
    return {k: h / reps for k, h in hits.items()}, true, marked


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=1000)
    parser.add_argument("--n", type=int, default=2000)
    parser.add_argument("--schemes", default="rows,strata")
    parser.add_argument("--scenarios", default="", help="comma-separated scenario numbers (1-based); default all")
    args = parser.parse_args()
    chosen = [name for i, name in enumerate(SCENARIOS, 1)
              if not args.scenarios or str(i) in args.scenarios.split(",")]
    half = 1.96 * np.sqrt(0.95 * 0.05 / args.reps)
    print(f"{args.reps} replications of n={args.n}; a correct 95% interval covers 0.95 +/- {half:.3f} (binomial)")
    for scheme in args.schemes.split(","):
        for name in chosen:
            started = time.perf_counter()
            cover, true, marked = coverage(name, args.reps, args.n, scheme)
            print(f"\n[{scheme}] {name} ({time.perf_counter() - started:.0f} s; {marked} replications had a marked interval)")
            for key in KEYS:
                print(f"  {key:28s} truth {true[key]:+.4f}  coverage {cover[key]:.3f}")


if __name__ == "__main__":
    main()
