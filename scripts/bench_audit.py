"""Time and peak memory of `evenflag audit` on a large Parquet export.

Writes a file of N rows (default 10 million) with a score, two group columns
(4 intersectional values), 12 monthly periods and a flag column, then runs
`evenflag audit` on it in a fresh process with 200 bootstrap resamples and a
throw-away tracking store, and prints the wall time, the peak resident memory
of that process and their ratios to the goals (60 s, 2 GB).

    .venv/bin/python scripts/bench_audit.py [--rows 10000000] [--keep DIR] [--no-flag-column]

Measured on the 2-core development machine (10 million rows, 200 resamples):
21-22 s and 1.09 GB with the flag column, 20.7 s and 1.10 GB without it.
"""

from __future__ import annotations

import argparse
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq


def write_file(path: Path, rows: int, seed: int = 0) -> None:
    """Invented demo data: a review queue of benefit claims over a year."""
    rng = np.random.default_rng(seed)
    writer = None
    per_chunk = 1_000_000
    for start in range(0, rows, per_chunk):
        n = min(per_chunk, rows - start)
        sex = rng.choice(np.array(["female", "male"]), n)
        region = rng.choice(np.array(["coast", "inland"]), n, p=[0.7, 0.3])
        month = rng.integers(1, 13, n)
        score = rng.normal(size=n) + 0.2 * (region == "inland") + 0.02 * month * (sex == "female")
        frame = pd.DataFrame({"claim_id": np.arange(start, start + n), "risk": score,
                              "sex": pd.Categorical(sex), "region": pd.Categorical(region),
                              "month": pd.Categorical([f"2026-{m:02d}" for m in range(1, 13)]).take(month - 1),
                              "flagged": (score > 1.9).astype(np.int8)})
        table = pa.Table.from_pandas(frame, preserve_index=False)
        writer = writer or pq.ParquetWriter(path, table.schema)
        writer.write_table(table, row_group_size=per_chunk)
    writer.close()


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--keep", default=None, help="folder for the file (reused when present)")
    parser.add_argument("--no-flag-column", action="store_true",
                        help="ignore the file's flags: the threshold policy flags the top 5%% of each month")
    args = parser.parse_args()
    folder = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(prefix="evenflag-bench-audit-"))
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"claims_{args.rows}.parquet"
    if not path.exists():
        started = time.perf_counter()
        write_file(path, args.rows)
        print(f"wrote {path} ({path.stat().st_size / 1e6:.0f} MB) in {time.perf_counter() - started:.1f} s")
    evenflag = Path(sys.executable).with_name("evenflag")
    command = [str(evenflag), "audit", str(path), "score=risk", "group=[sex,region]", "period=month",
               *([] if args.no_flag_column else ["flag=flagged"]), "id=claim_id", "metrics.bootstrap=200", f"out={folder / 'audit-out'}",
               f"tracking.uri=sqlite:///{folder / 'store' / 'mlflow.db'}", "rerun=true"]
    (folder / "store").mkdir(exist_ok=True)
    started = time.perf_counter()
    done = subprocess.run(command, capture_output=True, text=True)
    seconds = time.perf_counter() - started
    peak_gb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024**2  # kB on Linux
    if done.returncode:
        print(done.stdout[-2000:], done.stderr[-2000:])
        return 1
    print(done.stdout.splitlines()[0])
    print(f"rows {args.rows:,}: wall {seconds:.1f} s (goal 60 s, ratio {seconds / 60:.2f}), "
          f"peak memory {peak_gb:.2f} GB (goal 2 GB, ratio {peak_gb / 2:.2f})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
