"""Benchmark: the default metric suite with 200 bootstrap resamples on 1,000,000 rows,
against one np.sort of the same scores in the same run.

Goal (issue: metric suites): at most 20x the sort. Prints the ratio.

Usage: .venv/bin/python scripts/bench_metrics.py [--rows N]
"""

import argparse
import time
import warnings

import numpy as np

from evenflag.metrics.suites import evaluate


def best_of(fn, repeat):
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--resamples", type=int, default=200)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    n = args.rows
    group = rng.choice(["coast", "inland"], n, p=[0.7, 0.3])
    label = (rng.random(n) < 0.05).astype(int)
    score = rng.normal(size=n) + 2.0 * label + 0.3 * (group == "inland")
    flag = score >= np.quantile(score, 0.95)
    families = ["detection", "flag_fairness", "score_fairness"]

    sort_time = best_of(lambda: np.sort(score), 5)
    warnings.simplefilter("ignore")
    suite_time = best_of(lambda: evaluate(families, label, score, flag, group, n_bootstrap=args.resamples, seed=0), 3)
    point_time = best_of(lambda: evaluate(families, label, score, flag, group), 3)
    print(f"rows {n:,}, resamples {args.resamples}")
    print(f"np.sort of the scores:             {sort_time * 1000:8.1f} ms")
    print(f"suite, point estimates only:       {point_time * 1000:8.1f} ms = {point_time / sort_time:5.1f}x the sort")
    print(f"suite with bootstrap CIs:          {suite_time * 1000:8.1f} ms = {suite_time / sort_time:5.1f}x the sort (goal <= 20x)")


if __name__ == "__main__":
    main()
