"""Benchmark: load `adult` from the cache, split it and preprocess it once.

Goal (issue: foundation): under 0.5 s in a fresh process with a warm disk
cache. Prints the figure and its ratio to the goal.

Usage: .venv/bin/python scripts/bench_data_load.py
"""

import subprocess
import sys

CHILD = r"""
import time
t0 = time.perf_counter()
from evenflag.data.registry import load_dataset
from evenflag.data.protocol import ProtocolSpec, make_split
from evenflag.data.preprocessing import prepare
t1 = time.perf_counter()
ds = load_dataset("adult")
t2 = time.perf_counter()
split = make_split(ds, ProtocolSpec(kind="contaminated", test_anomaly_rate=0.05, train_anomaly_rate=0.05), seed=0)
t3 = time.perf_counter()
data = prepare(ds, split)
t4 = time.perf_counter()
print(f"{t1-t0:.3f} {t2-t1:.3f} {t3-t2:.3f} {t4-t3:.3f}")
"""


def main():
    subprocess.run([sys.executable, "-c", CHILD], check=True, capture_output=True)  # warm the disk cache
    runs = []
    for _ in range(5):
        out = subprocess.run([sys.executable, "-c", CHILD], check=True, capture_output=True, text=True).stdout
        runs.append([float(x) for x in out.split()])
    runs.sort(key=lambda r: sum(r[1:]))
    imports, load, split, prep = runs[len(runs) // 2]
    total = load + split + prep
    print(f"imports {imports:.3f} s (not counted)")
    print(f"load adult from cache {load:.3f} s, split {split:.3f} s, preprocess {prep:.3f} s")
    print(f"load + split + preprocess: {total:.3f} s = {total / 0.5:.2f}x the 0.5 s goal (median of 5 fresh processes)")


if __name__ == "__main__":
    main()
