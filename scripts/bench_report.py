"""Benchmark: `evenflag report` over a study of 500 runs. Goal: under 10 s.

The store is filled directly through MLflow's client with runs shaped like
evenflag's (the same params, about 150 metric keys with intervals, tags and a
scores artifact), so the benchmark measures the report, not the sweep.

Usage: .venv/bin/python scripts/bench_report.py [--runs N]
"""

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")
os.environ.setdefault("MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR", "false")


def fill_store(uri: str, runs: int, folder: Path) -> None:
    from mlflow.entities import Metric, Param, RunTag
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=uri)
    experiment = client.create_experiment("bench", artifact_location=(folder / "artifacts").as_uri())
    rng = np.random.default_rng(0)
    datasets = ["adult", "german_credit", "arrests", "resume", "hmda"]
    detectors = ["isolation_forest", "autoencoder", "deep_svdd", "adversarial", "local_outlier_factor"]
    groups = ["a", "b"]
    scores = pd.DataFrame({"row_id": np.arange(2000), "label": rng.random(2000) < 0.05, "group": rng.choice(groups, 2000),
                           "score": rng.normal(size=2000), "flag": rng.random(2000) < 0.05})
    scores.to_parquet(folder / "scores.parquet")
    keys = ["auroc", "average_precision", "flag_rate_ratio", "score_distance", "false_flag_gap", "leakage_auroc",
            "flag_rate_gap", "hit_rate_gap", "score_ks", "group_auroc_gap", "flag_f1", "precision_at_k"]
    keys += [f"{k}/{g}" for k in ("flag_rate", "hit_rate", "false_flag_rate", "precision", "auroc") for g in groups]
    keys += [f"{k}.{end}" for k in list(keys) for end in ("ci_low", "ci_high")]
    now = int(time.time() * 1000)
    for i in range(runs):
        dataset, detector, seed = datasets[i % 5], detectors[(i // 5) % 5], i // 25
        run = client.create_run(experiment, tags={"evenflag.dataset": dataset, "evenflag.data_sha256": f"{i % 5:064d}",
                                                  "evenflag.git_commit": "0" * 40, "evenflag.groups": "a,b"})
        params = [Param("dataset.name", dataset), Param("detector.name", detector), Param("seed", str(seed)),
                  Param("protocol.kind", "contaminated"), Param("threshold.policy", "top_fraction"),
                  Param("threshold.fraction", "0.05"), Param("mitigation.kind", "none")]
        metrics = [Metric(k, float(rng.random()), now, 0) for k in keys]
        client.log_batch(run.info.run_id, metrics=metrics, params=params, tags=[RunTag("evenflag.status", "finished")])
        if i == 0:
            client.log_artifact(run.info.run_id, str(folder / "scores.parquet"))
        client.set_terminated(run.info.run_id, "FINISHED")


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--runs", type=int, default=500)
    args = parser.parse_args()
    from evenflag.report.build import ReportRequest, build_report

    with tempfile.TemporaryDirectory(prefix="evenflag-bench-report-") as name:
        folder = Path(name)
        uri = f"sqlite:///{folder / 'mlflow.db'}"
        start = time.perf_counter()
        fill_store(uri, args.runs, folder)
        print(f"filled a store with {args.runs} runs in {time.perf_counter() - start:.1f} s (not counted)")
        for memo in (False, True):
            start = time.perf_counter()
            build_report(ReportRequest(uri=uri, studies=["bench"], out=folder / "report", memo=memo))
            seconds = time.perf_counter() - start
            print(f"report over {args.runs} runs (tables, figures{', memo' if memo else ''}): {seconds:.2f} s "
                  f"= {seconds / 10:.2f}x the 10 s goal")


if __name__ == "__main__":
    main()
