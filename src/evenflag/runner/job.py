"""One Hydra job: skip if already finished, else execute and track it.

Nothing raised here escapes: a failing run is recorded as FAILED with a
one-line reason and the sweep goes on.
"""

from __future__ import annotations

import os
import shutil
import time
from pathlib import Path

from omegaconf import DictConfig, OmegaConf

from evenflag.runner import ledger
from evenflag.runner.lease import Heartbeat
from evenflag.runner.provenance import fingerprint, flatten, git_state, library_versions
from evenflag.runner.tracking import TAG, tracker_for


def _detector_choice() -> str | None:
    """The ``detector=`` option the user picked, when Hydra composed this job."""
    try:
        from hydra.core.hydra_config import HydraConfig

        return HydraConfig.get().runtime.choices.get("detector")
    except ValueError:
        return None


def _detector_name(cfg: DictConfig) -> str:
    from evenflag.detectors.base import describe_detector

    return describe_detector(OmegaConf.to_container(cfg.detector, resolve=True), _detector_choice())


def _name(cfg: DictConfig) -> str:
    extra = f" {cfg.mitigation.kind}" if cfg.mitigation.kind != "none" else ""
    weight = f" weight={cfg.detector.weight}" if "weight" in cfg.detector else ""
    return f"{cfg.dataset.name} {_detector_name(cfg)}{weight}{extra} seed={cfg.seed}"


def _output_dir() -> Path:
    try:
        from hydra.core.hydra_config import HydraConfig

        return Path(HydraConfig.get().runtime.output_dir)
    except ValueError:
        return Path.cwd()


def _record(entry: dict) -> None:
    """A ledger line with what the launcher needs: the detector (for the time
    estimate) and this job's output folder (removed if nothing in the launch ran)."""
    ledger.record({**entry, "detector": _detector_choice(), "output_dir": str(_output_dir())})


def run_job(cfg: DictConfig) -> dict:
    """Run or skip one job; returns {"status": done | skipped | busy | failed,
    "run_id", "metrics"} (a search sweeper reads its objectives from the metrics;
    a skipped cell gives back the metrics of its finished run)."""
    from evenflag.runner.app import format_exception, raise_if_interrupted
    from evenflag.runner.run import execute, limit_threads

    raise_if_interrupted(stopped_too=True)  # no new job after Ctrl-C or SIGTERM
    started = time.time()
    name = _name(cfg)
    limit_threads(cfg.get("threads"))
    launch_dir = Path(os.environ.get("EVENFLAG_LAUNCH_DIR", Path.cwd()))
    resolved = OmegaConf.to_container(cfg, resolve=True)
    tracker = run_id = beat = None
    try:
        tracker = tracker_for(cfg.tracking.uri, cfg.study, cfg.tracking.artifact_root, launch_dir,
                              cfg.tracking.timeout_seconds, cfg.tracking.claim_settle_seconds)
        from evenflag.data.registry import load_dataset, to_spec

        dataset = load_dataset(to_spec(resolved["dataset"]))
        fp = fingerprint(resolved, dataset.sha256, dataset.table_sha256)
        commit, dirty = git_state()
        tags = {f"{TAG}data_sha256": dataset.sha256, f"{TAG}table_sha256": dataset.table_sha256,
                f"{TAG}git_commit": commit, f"{TAG}git_dirty": str(dirty).lower(), f"{TAG}dataset": cfg.dataset.name,
                f"{TAG}detector": _detector_name(cfg),
                **{f"{TAG}version.{k}": v for k, v in library_versions().items()},
                **{str(k): str(v) for k, v in (cfg.tags or {}).items()}}
        # Claim the cell before computing: a finished run or a live claim elsewhere means skip.
        run_id, busy = tracker.claim(fp, name, tags, rerun=bool(cfg.rerun))
        if run_id is None:
            _record({"status": "skipped", "name": name, "summary": busy})
            finished = tracker.find_finished(fp) if busy.startswith("finished") else None
            if finished is None:  # running in another launch: no metrics to give back yet
                return {"status": "busy", "run_id": None, "metrics": {}}
            return {"status": "skipped", "run_id": finished, "metrics": tracker.metrics_of(finished)}
        beat = Heartbeat(lambda: tracker.heartbeat(run_id),
                         on_orphaned=lambda: tracker.kill(run_id, "its launcher died (the parent process was killed)"))
        # Params first, so a run that fails below still says what it was.
        tracker.log(run_id, flatten({k: v for k, v in resolved.items() if k not in ("tracking", "tags")}), {}, {})
        out = execute(cfg)
        raise_if_interrupted(stopped_too=True)  # a signal dropped by a finaliser still ends the run as KILLED
        # Artifacts are written once, into the tracking store's artifact root; the
        # staging folder under the job's output folder is removed once they are logged.
        artifacts = _output_dir() / "artifacts"
        artifacts.mkdir(parents=True, exist_ok=True)
        (artifacts / "config.yaml").write_text(_yaml(resolved))
        out.scores.to_parquet(artifacts / "scores.parquet", index=False)
        metrics = {**out.metrics, **{f"time.{k}": v for k, v in out.timings.items()}}
        notes = {f"{TAG}{k}": v for k, v in out.notes.items()}
        notes[f"{TAG}groups"] = ",".join(map(str, out.dataset.group.cat.categories))
        notes[f"{TAG}source"] = out.dataset.source
        if out.dataset.missing_values:  # filled by the encoder; say how many, per column
            notes[f"{TAG}missing_values"] = ",".join(f"{c}={n}" for c, n in out.dataset.missing_values.items())
        notes[f"{TAG}status"] = "finished"
        tracker.log(run_id, {}, metrics, notes)
        if out.history:
            tracker.log_history(run_id, out.history)
        tracker.log_artifacts(run_id, artifacts)
        shutil.rmtree(artifacts, ignore_errors=True)
        beat.stop()
        tracker.finish(run_id)
        if cfg.rerun:
            tracker.supersede(fp, run_id)
        summary = f"run {run_id[:8]}  " + ", ".join(
            f"{k} {out.metrics[k]:.3f}" for k in ("auroc", "flag_rate_ratio") if k in out.metrics)
        _record({"status": "done", "name": name, "run_id": run_id, "summary": summary,
                 "seconds": round(time.time() - started, 2)})
        return {"status": "done", "run_id": run_id, "metrics": dict(out.metrics)}
    except (KeyboardInterrupt, SystemExit) as exc:  # Ctrl-C, or SIGTERM turned into SystemExit by the launcher
        if tracker is not None and run_id is not None:
            try:
                tracker.kill(run_id, f"interrupted ({_signal_name(exc)}) before it finished")
            except Exception:  # the store is unreachable: the lease will close the run later
                pass
        raise
    except Exception as exc:  # isolate the failure: record it, let the sweep go on
        message = format_exception(exc)
        if tracker is not None and run_id is not None:
            try:
                tracker.fail(run_id, message)
            except Exception as tracking_exc:  # the store itself failed; say so, keep going
                message += f" (and the failure could not be recorded: {format_exception(tracking_exc)})"
        _record({"status": "failed", "name": name, "run_id": run_id, "message": message,
                 "seconds": round(time.time() - started, 2)})
        if not os.environ.get(ledger.LEDGER_ENV):
            print(f"evenflag: run failed: {message}")
        return {"status": "failed", "run_id": run_id, "metrics": {}}
    finally:
        if beat is not None:
            beat.stop()


def _yaml(resolved: dict) -> str:
    """The resolved config as YAML, with libyaml's emitter where there is one
    (OmegaConf.to_yaml took about 20 ms per run)."""
    import yaml

    dumper = getattr(yaml, "CSafeDumper", yaml.SafeDumper)
    return yaml.dump(resolved, Dumper=dumper, sort_keys=False, default_flow_style=False, allow_unicode=True)


def _signal_name(exc: BaseException) -> str:
    if isinstance(exc, KeyboardInterrupt):
        return "SIGINT"
    return str(exc.code) if isinstance(exc, SystemExit) and isinstance(exc.code, str) else "SIGTERM"
