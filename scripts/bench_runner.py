"""Benchmarks of the runner. Prints ratios; goals from the runner issue.

1. Per-run overhead of evenflag (everything but detector fit and score) on a
   trivial detector, against a bare Hydra app's no-op job, same sweep size.
   Goal: at most 2x.
2. Speed-up of a 2-job joblib sweep over the basic launcher on the same 8
   isolation-forest runs on adult. Goal: at least 1.7x.
3. Peak resident memory of one run on adult per detector. Goal: under 1 GB.

Usage: .venv/bin/python scripts/bench_runner.py [--jobs N] [--repeat R] [--skip-memory] [--parts overhead,parallel,memory]
Scratch files go to a temporary folder.
"""

import argparse
import os
import re
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

ENV = {**os.environ, "MLFLOW_DISABLE_TELEMETRY": "true", "HYDRA_FULL_ERROR": "1"}
# A trivial detector: one Gaussian fitted to the training rows.
TRIVIAL = ["dataset=synthetic_claims", "detector=sklearn", "detector.estimator=sklearn.mixture.GaussianMixture",
           "+detector.params.n_components=1"]
BARE_APP = textwrap.dedent('''
    import hydra
    from omegaconf import DictConfig

    @hydra.main(config_path=None, config_name=None, version_base="1.3")
    def main(cfg: DictConfig) -> None:
        pass

    if __name__ == "__main__":
        main()
''')
# The same no-op job, composing evenflag's own config tree with Hydra's basic
# sweeper and loader: what Hydra alone costs per job for a tree of this size.
NOOP_ON_OUR_CONFIGS = textwrap.dedent('''
    import hydra
    from omegaconf import DictConfig
    from evenflag.paths import config_dir
    from evenflag.runner.config import register

    register()

    @hydra.main(config_path=str(config_dir()), config_name="config", version_base="1.3")
    def main(cfg: DictConfig) -> None:
        pass

    if __name__ == "__main__":
        main()
''')


def timed(command, cwd):
    start = time.perf_counter()
    result = subprocess.run(command, cwd=cwd, capture_output=True, text=True, env=ENV)
    if result.returncode:
        sys.exit(f"failed: {' '.join(command)}\n{result.stdout[-2000:]}\n{result.stderr[-2000:]}")
    return time.perf_counter() - start, result.stdout


def evenflag(*args):
    return [sys.executable, "-m", "evenflag.cli", *args]


def fit_and_score_seconds(store: Path, study: str) -> float:
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=f"sqlite:///{store}")
    experiment = client.get_experiment_by_name(study)
    runs = client.search_runs([experiment.experiment_id], max_results=10000)
    return sum(r.data.metrics.get("time.fit", 0) + r.data.metrics.get("time.score", 0) for r in runs)


def overhead(scratch: Path, jobs: int, repeat: int):
    seeds = ",".join(str(i) for i in range(jobs))
    (scratch / "bare.py").write_text(BARE_APP)
    # Warm both (imports, the store) so neither pays first-use costs in the timing.
    timed([sys.executable, "bare.py", "-m", "+seed=0"], scratch)
    timed(evenflag("run", *TRIVIAL, "study=warm", "metrics=quick"), scratch)
    print(f"1. per-run overhead, {jobs} jobs, basic launcher, point metrics ({repeat} rounds, bare and ours in turn)")
    ratios = []
    for round_ in range(repeat):
        bare, _ = timed([sys.executable, "bare.py", "-m", f"+seed={seeds}"], scratch)
        ours, _ = timed(evenflag("run", "-m", *TRIVIAL, f"study=overhead{round_}",
                                 "metrics=quick", f"seed={seeds}"), scratch)
        detector = fit_and_score_seconds(scratch / "outputs" / "tracking" / "mlflow.db", f"overhead{round_}")
        per_bare, per_ours = bare / jobs, (ours - detector) / jobs
        ratios.append(per_ours / per_bare)
        print(f"   bare Hydra no-op job: {per_bare * 1000:.0f} ms/run; evenflag without fit+score: "
              f"{per_ours * 1000:.0f} ms/run = {ratios[-1]:.2f}x")
    print(f"   median {sorted(ratios)[len(ratios) // 2]:.2f}x (goal <= 2x)")
    ours_b, _ = timed(evenflag("run", "-m", *TRIVIAL, "study=overhead_b",
                               f"seed={seeds}"), scratch)
    detector_b = fit_and_score_seconds(scratch / "outputs" / "tracking" / "mlflow.db", "overhead_b")
    per_b = (ours_b - detector_b) / jobs
    print(f"   with 200 bootstrap resamples (metrics=default): {per_b * 1000:.0f} ms/run = {per_b / per_bare:.2f}x")
    (scratch / "noop_ours.py").write_text(NOOP_ON_OUR_CONFIGS)
    timed([sys.executable, "noop_ours.py", "-m", "seed=0"], scratch)
    noop, _ = timed([sys.executable, "noop_ours.py", "-m", *TRIVIAL, f"seed={seeds}"], scratch)
    print(f"   for scale: a no-op job on evenflag's config tree through Hydra's own sweeper, which composes "
          f"every job twice from scratch: {noop / jobs * 1000:.0f} ms/run")


def parallel(scratch: Path):
    timed(evenflag("run", "dataset=adult", "study=warm", "metrics=quick"), scratch)
    print("2. runs on adult, basic launcher against joblib with 2 jobs (whole launch, wall time)")
    for detector, runs, metrics in (("isolation_forest", 8, "quick"), ("isolation_forest", 8, "default"),
                                    ("isolation_forest", 24, "default"), ("deep_svdd", 8, "default")):
        args = ["dataset=adult", f"detector={detector}", "protocol=contaminated", f"metrics={metrics}",
                "rerun=true", "seed=" + ",".join(map(str, range(runs)))]
        study = f"{detector}{runs}{metrics}"
        basic, _ = timed(evenflag("run", "-m", *args, f"study=basic{study}"), scratch)
        joblib, _ = timed(evenflag("run", "-m", *args, f"study=joblib{study}", "hydra/launcher=parallel",
                                   "hydra.launcher.n_jobs=2"), scratch)
        goal = " (goal >= 1.7x)" if runs == 8 and detector == "isolation_forest" else ""
        print(f"   {runs} {detector} runs, metrics={metrics}: basic {basic:.1f} s, joblib {joblib:.1f} s: "
              f"speed-up {basic / joblib:.2f}x{goal}")


def memory(scratch: Path, detectors):
    print("3. peak resident memory of one run on adult (fresh process, metrics=default)")
    for detector in detectors:
        child = textwrap.dedent(f'''
            import resource, sys
            from evenflag.cli import main
            code = main(["run", "dataset=adult", "detector={detector}", "study=memory", "rerun=true"])
            print("PEAK", resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
            sys.exit(code)
        ''')
        seconds, out = timed([sys.executable, "-c", child], scratch)
        peak_kb = int(re.search(r"PEAK (\d+)", out).group(1))
        print(f"   {detector:<22} {peak_kb / 1024:7.0f} MB = {peak_kb / 1024 / 1024:.2f}x of 1 GB ({seconds:.1f} s)")


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--jobs", type=int, default=20)
    parser.add_argument("--repeat", type=int, default=3, help="rounds of the overhead measurement")
    parser.add_argument("--skip-memory", action="store_true")
    parser.add_argument("--parts", default="overhead,parallel,memory", help="which of the three to run")
    parser.add_argument("--detectors", default="isolation_forest,local_outlier_factor,autoencoder,deep_svdd,adversarial")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="evenflag-bench-") as folder:
        scratch = Path(folder)
        parts = args.parts.split(",")
        if "overhead" in parts:
            overhead(scratch, args.jobs, args.repeat)
        if "parallel" in parts:
            parallel(scratch)
        if "memory" in parts and not args.skip_memory:
            memory(scratch, args.detectors.split(","))


if __name__ == "__main__":
    main()
