"""False-positive rate and power of the audit's first-vs-last change test.

Simulates two periods of an audit where each group's score distribution is the
same in both periods (no change: any rejection is a false positive), and one
where the minority's scores shift up in the last period (power). Flags are the
top q of each period's scores (a review budget) or a fixed score cut.

    .venv/bin/python scripts/sim_audit_change.py [--reps 2000]
"""

from __future__ import annotations

import argparse

import numpy as np

from evenflag.audit.compute import ratio_change


def simulate(rng, rows, share, gap, change, fraction, policy, reps):
    rejected = tested = 0
    for _ in range(reps):
        tables = []
        for period in range(2):
            minority = rng.random(rows) < share
            score = rng.normal(size=rows) + (gap + change * period) * minority
            if policy == "budget":
                flag = score >= np.sort(score)[-int(round(fraction * rows))]
            else:
                flag = score > 1.645  # a fixed cut: about 5% of a standard normal
            tables.append((int(flag[minority].sum()), int(minority.sum()), int(flag[~minority].sum()),
                           int((~minority).sum())))
        p = ratio_change(*tables)[3]
        if np.isfinite(p):
            tested += 1
            rejected += p < 0.05
    return rejected / max(tested, 1), tested


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--reps", type=int, default=2000)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    print("rows  minority  gap  change  flags    rejected at 5%  (tested)")
    for rows, share, gap, change, policy in [
            (3000, 0.3, 0.5, 0.0, "budget"), (3000, 0.3, 0.5, 0.0, "fixed"), (800, 0.3, 0.5, 0.0, "budget"),
            (20000, 0.1, 1.0, 0.0, "budget"), (3000, 0.5, 0.0, 0.0, "budget"),
            (3000, 0.3, 0.5, 0.3, "budget"), (20000, 0.1, 1.0, 0.2, "budget")]:
        rate, tested = simulate(rng, rows, share, gap, change, 0.05, policy, args.reps)
        print(f"{rows:5d}  {share:8.1f}  {gap:3.1f}  {change:6.1f}  {policy:7s}  {rate:14.3f}  ({tested})")


if __name__ == "__main__":
    main()
