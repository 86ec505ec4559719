"""``evenflag report``: select studies, aggregate over seeds, write the outputs."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

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


def caption(runs: RunTable) -> str:
    seeds = sorted(set(runs.runs["seed"]))
    return (f"Study {', '.join(runs.studies)}: mean over seeds {', '.join(map(str, seeds))} "
            f"with 95% t-interval half-width over seeds (clipped to the metric's range, then shown as [low, high]); "
            f"bold where a row's interval is separated from every other row of its dataset in the better direction "
            f"(arrows: higher or lower is better, or closer to the value shown).")


def build_report(request: ReportRequest) -> dict[str, Path]:
    runs = load_runs(request.uri, request.studies, request.where)
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

        written.update(write_figures(runs, table, out, run_id=request.run_id))
    if request.memo:
        from evenflag.report.memo import write_memo

        written.update(write_memo(runs, table, request, written, html=request.html))
    written["_markdown"] = markdown + "\n" + CAUTION.replace("**", "") + "\n"
    return written
