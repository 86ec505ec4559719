"""The sweep ledger: one JSON line per finished job, shared by every job of a
launch (whatever process or launcher runs it), read back for progress and the
final summary."""

from __future__ import annotations

import json
import os
import time
from pathlib import Path

LEDGER_ENV = "EVENFLAG_LEDGER"
TOTAL_ENV = "EVENFLAG_SWEEP_TOTAL"
START_ENV = "EVENFLAG_SWEEP_START"
PLAN_ENV = "EVENFLAG_SWEEP_PLAN"   # {detector: jobs} of the launch, for the time estimate


def record(entry: dict) -> None:
    """Append one line (a single small O_APPEND write, safe across processes)
    and print the progress line."""
    path = os.environ.get(LEDGER_ENV)
    if not path:
        return
    line = (json.dumps(entry, default=str) + "\n").encode()
    try:
        fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        try:
            os.write(fd, line)
        finally:
            os.close(fd)
        entries = read(path)
    except OSError:
        # A job that cannot reach the ledger (another machine without the launch
        # directory) still finished: the tracking store has it; only the summary misses it.
        return
    done = len(entries)
    total = int(os.environ.get(TOTAL_ENV, "0") or 0)
    elapsed = time.time() - float(os.environ.get(START_ENV, time.time()))
    plan = json.loads(os.environ.get(PLAN_ENV) or "{}")
    eta = estimate_left(entries, plan, elapsed) if plan else (
        elapsed / done * (total - done) if total and done else 0.0)
    of = f"/{total}" if total else ""
    detail = entry.get("summary") or entry.get("message") or ""
    print(f"[{done}{of}] {entry['status']:<8} {entry.get('name', '')}  {detail}  "
          f"elapsed {_clock(elapsed)}, eta {_clock(eta)}", flush=True)


def estimate_left(entries: list[dict], plan: dict[str, int], elapsed: float) -> float:
    """Seconds left: the jobs still to come of each detector times the median
    time of that detector's finished jobs (of all finished jobs before the
    first one of it ends), scaled by wall time per job-second so far (which
    folds in parallel workers and per-job overhead). A sweep mixing fast and
    slow detectors is not priced at its first job's speed.

    >>> entries = [{"detector": "fast", "status": "done", "seconds": 1.0},
    ...            {"detector": "slow", "status": "done", "seconds": 30.0}]
    >>> estimate_left(entries, {"fast": 3, "slow": 2}, elapsed=31.0)
    32.0
    """
    timed = [e for e in entries if e.get("status") in ("done", "failed") and e.get("seconds")]
    if not timed:
        return 0.0
    seconds = [float(e["seconds"]) for e in timed]
    per_detector: dict[str, list[float]] = {}
    for entry in timed:
        per_detector.setdefault(str(entry.get("detector")), []).append(float(entry["seconds"]))
    seen = {str(name): sum(str(e.get("detector")) == str(name) for e in entries) for name in plan}
    job_seconds = sum(max(int(count) - seen[str(name)], 0) * _median(per_detector.get(str(name), seconds))
                      for name, count in plan.items())
    return job_seconds * (elapsed / sum(seconds))


def _median(values: list[float]) -> float:
    ordered = sorted(values)
    middle = len(ordered) // 2
    return ordered[middle] if len(ordered) % 2 else (ordered[middle - 1] + ordered[middle]) / 2


def output_dirs_made(entries: list[dict], multirun: bool) -> set[Path]:
    """The output folders the jobs of this launch wrote (each entry records its
    job's folder): the sweep folders (a job folder's parent) with -m, else the
    run folders. Never a folder of another launch running beside this one.

    >>> jobs = [{"output_dir": "out/sweeps/s/t1/0"}, {"output_dir": "out/sweeps/s/t1/1"}]
    >>> [str(p) for p in output_dirs_made(jobs, multirun=True)]
    ['out/sweeps/s/t1']
    """
    folders = {Path(e["output_dir"]) for e in entries if e.get("output_dir")}
    return {f.parent for f in folders} if multirun else folders


def read(path: str | Path) -> list[dict]:
    path = Path(path)
    if not path.exists():
        return []
    return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]


def _clock(seconds: float) -> str:
    seconds = int(round(seconds))
    return f"{seconds // 60}m{seconds % 60:02d}s" if seconds >= 60 else f"{seconds}s"


def remove_stale(folder: Path) -> int:
    """Delete ledgers of launches whose process is gone (a killed launch cannot
    remove its own). Ledger names end in the launcher's process id."""
    from evenflag.runner.lease import process_alive

    removed = 0
    for path in Path(folder).glob("*.jsonl") if Path(folder).exists() else []:
        pid = path.stem.rsplit("-", 1)[-1]
        if pid.isdigit() and not process_alive(int(pid)):
            path.unlink(missing_ok=True)
            removed += 1
    return removed
