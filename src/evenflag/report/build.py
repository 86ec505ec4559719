"""``evenflag report``: select studies, aggregate over seeds, write the outputs."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from evenflag.errors import EvenflagError
from evenflag.report.collect import RunTable, load_runs
from evenflag.report.memo import CAUTION
from evenflag.report.tables import DEFAULT_METRICS, aggregate, to_csv, to_latex, to_markdown

@dataclass
class ReportRequest:
    uri: str
    studies: list[str]
    where: dict[str, str] = field(default_factory=dict)
    metrics: list[str] = field(default_factory=lambda: list(DEFAULT_METRICS))
    out: Path = Path("outputs/reports")
    figures: bool = True
    memo: bool = False
    html: bool = False
    run_id: str | None = None
    note: str | None = None      # the authors' own Markdown, a section of the memo
    metrics_given: bool = False  # the user named the metrics: an unknown one is an error, not an empty column


def caption(runs: RunTable) -> str:
    seeds = sorted(set(runs.runs["seed"]))
    return (f"Study {', '.join(runs.studies)}: mean over seeds {', '.join(map(str, seeds))} "
            f"with 95% t-interval half-width over seeds (clipped to the metric's range, then shown as [low, high]); "
            f"bold where a row's interval is separated from every other row of its dataset in the better direction "
            f"(arrows: higher or lower is better, or closer to the value shown).")


def check_metric_keys(requested: list[str], available: list[str]) -> None:
    """Refuse a ``--metrics`` key that no selected run has, listing the ones they have."""
    unknown = [m for m in requested if m not in available]
    if unknown:
        shown = [k for k in available if not k.rsplit(".", 1)[-1] in ("ci_low", "ci_high", "ci_degenerate")
                 and not k.startswith(("time.", "train."))]
        raise EvenflagError(f"--metrics: no selected run has the key '{unknown[0]}'; keys they have: "
                            f"{', '.join(shown[:40])}{' ...' if len(shown) > 40 else ''}")


def resolve_run_id(given: str, run_ids: list[str]) -> str:
    """A full run id from a full one or a unique prefix (the runner prints 8 characters).

    >>> resolve_run_id("ab12", ["ab12cd", "ff00aa"])
    'ab12cd'
    """
    matches = sorted({r for r in run_ids if r.startswith(given)})
    if len(matches) == 1:
        return matches[0]
    if not matches:
        raise EvenflagError(f"--run-id {given}: no selected run has that id or id prefix; check the id "
                            "(and --study/--where, which select the runs)")
    raise EvenflagError(f"--run-id {given}: {len(matches)} runs start with it ({', '.join(m[:12] for m in matches[:4])}"
                        f"...); give more characters")


def build_report(request: ReportRequest) -> dict[str, Path]:
    runs = load_runs(request.uri, request.studies, request.where)
    if request.metrics_given:
        check_metric_keys(request.metrics, runs.metric_columns)
    run_id = resolve_run_id(request.run_id, list(runs.runs["run_id"])) if request.run_id else None
    table = aggregate(runs.runs, request.metrics)
    out = Path(request.out)
    out.mkdir(parents=True, exist_ok=True)
    written = {}
    markdown = to_markdown(table, request.metrics)
    written["table.md"] = out / "table.md"
    written["table.md"].write_text(markdown + "\n> " + CAUTION + "\n")
    written["table.tex"] = out / "table.tex"
    written["table.tex"].write_text(to_latex(table, request.metrics, caption(runs)))
    written["table.csv"] = out / "table.csv"
    written["table.csv"].write_text(to_csv(table))
    if request.figures:
        from evenflag.report.figures import write_figures

        written.update(write_figures(runs, table, out, run_id=run_id))
    from evenflag.report.search import write_search

    written.update(write_search(runs, out, figures=request.figures))
    if request.memo:
        from evenflag.report.memo import write_memo

        written.update(write_memo(runs, table, request, written, html=request.html))
    written["_markdown"] = markdown + "\n" + CAUTION.replace("**", "") + "\n"
    return written
