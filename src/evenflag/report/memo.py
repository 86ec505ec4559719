"""The memo: one Markdown file (optionally HTML) a reviewer can read start to end."""

from __future__ import annotations

import html
from pathlib import Path

import numpy as np
import pandas as pd

from evenflag.report.collect import RunTable
from evenflag.report.stats import friedman_nemenyi, wilcoxon_pair
from evenflag.report.tables import HIGHER_BETTER

CAUTION = (
    "**Caution.** These numbers describe detectors on particular data sets under one protocol and one "
    "threshold policy; they change with the data, the protocol and the threshold. The four-fifths rule is a "
    "rule of thumb, not a legal finding. Group-specific thresholds treat people differently by group and may "
    "be unlawful in some places. Defer to local law, regulators and qualified counsel before acting on them."
)


def _fmt(value: float) -> str:
    return "n/a" if value is None or not np.isfinite(value) else f"{value:.3f}"


def metadata_lines(runs: RunTable) -> list[str]:
    frame = runs.runs
    lines = [f"- studies: {', '.join(runs.studies)} (tracking store `{runs.uri}`)",
             f"- runs: {len(frame)} ({int((frame['status'] == 'FINISHED').sum())} finished, "
             f"{int((frame['status'] == 'FAILED').sum())} failed)",
             f"- seeds: {', '.join(map(str, sorted(set(frame['seed']))))}",
             f"- protocol: {', '.join(sorted(set(frame['protocol'])))}; threshold: {', '.join(sorted(set(frame['threshold'])))}",
             f"- code version (git commit): {', '.join(sorted(set(c[:12] for c in frame['git_commit'] if c)))}",
             "- datasets (sha256 of the raw bytes):"]
    for dataset, rows in frame.groupby("dataset"):
        hashes = sorted(set(rows["data_sha256"]))
        groups = sorted(set(g for g in rows["groups"] if g))
        lines.append(f"  - `{dataset}`: {', '.join(f'`{h}`' for h in hashes)}; groups: {'; '.join(groups)}")
    return lines


def reading(runs: RunTable, table: pd.DataFrame) -> list[str]:
    """Plain-language sentences generated from the aggregated numbers."""
    out = []
    for dataset, cells in table.groupby("dataset"):
        cells = cells[cells["n_finished"] > 0]
        if cells.empty or "auroc.mean" not in cells:
            continue
        best = cells.loc[cells["auroc.mean"].idxmax()]
        sentence = (f"On **{dataset}**, {best['detector']}"
                    + (f" (weight {best['weight']:g})" if pd.notna(best["weight"]) else "")
                    + f" ranks anomalies best (AUROC {_fmt(best['auroc.mean'])}).")
        if "flag_rate_ratio.mean" in cells:
            below = cells[cells["flag_rate_ratio.mean"] < 0.8]
            if len(below):
                names = ", ".join(sorted(set(below["detector"] + below["weight"].map(
                    lambda w: f" (weight {w:g})" if pd.notna(w) else ""))))
                sentence += (f" Mean flag-rate ratios below the four-fifths line (0.8): {names}"
                             f" (lowest {_fmt(below['flag_rate_ratio.mean'].min())}).")
            else:
                sentence += " Every detector's mean flag-rate ratio is at or above 0.8."
        out.append(sentence)
    frame = runs.runs
    detectors = set(frame["detector"])
    if {"adversarial deep_svdd", "deep_svdd"} <= detectors:
        for metric, word in (("leakage_auroc", "group leakage of the embedding"), ("flag_rate_ratio", "flag-rate ratio"),
                             ("auroc", "AUROC")):
            if metric in frame:
                test = wilcoxon_pair(frame, "adversarial deep_svdd", "deep_svdd", metric)
                if test["n"] >= 2 and np.isfinite(test["median_difference"]):
                    out.append(f"Adversarial against plain Deep SVDD, {word}: median paired difference "
                               f"{test['median_difference']:+.3f} over {test['n']} dataset x seed pairs "
                               f"(Wilcoxon signed-rank p = {test['p_value']:.3g}).")
    return out


def friedman_lines(table: pd.DataFrame, metrics=("auroc", "flag_rate_ratio")) -> list[str]:
    from evenflag.report.figures import method_matrix

    lines = []
    for metric in metrics:
        if f"{metric}.mean" not in table:
            continue
        matrix = method_matrix(table, metric)
        if matrix.shape[0] < 2 or matrix.shape[1] < 3:
            continue
        try:
            result = friedman_nemenyi(matrix, higher_is_better=metric in HIGHER_BETTER)
        except ValueError:
            continue
        ranks = ", ".join(f"{m} {r:.2f}" for m, r in sorted(zip(result.methods, result.mean_ranks), key=lambda t: t[1]))
        lines.append(f"- {metric.replace('_', ' ')}: mean ranks {ranks}; Friedman chi2_F = {result.chi2_f:.2f}, "
                     f"Iman-Davenport F_F = {result.f_f:.2f} (p = {result.p_value:.3g}); Nemenyi CD = "
                     f"{result.critical_difference:.2f} at alpha 0.05 over {result.n_datasets} datasets.")
    return lines


def write_memo(runs: RunTable, table: pd.DataFrame, request, written: dict, html: bool = False) -> dict[str, Path]:
    out = Path(request.out)
    figures = [name for name in ("tradeoff.png", "flag_rates.png", "score_ecdf.png", "critical_difference.png")
               if name in written]
    parts = [f"# Fairness audit memo: {', '.join(runs.studies)}", "", "## What was run", *metadata_lines(runs), "",
             "## Main table", "", "Mean over seeds with the half-width of a 95% t-interval over seeds; "
             "best per dataset in bold; `failed`/`missing` mark cells without results.", "",
             (out / "table.md").read_text().split("\n> ")[0], "## Reading", ""]
    parts += [f"- {line}" for line in reading(runs, table)] or ["- (no finished runs)"]
    stats_lines = friedman_lines(table)
    if stats_lines:
        parts += ["", "## Comparison across datasets", "", *stats_lines]
    if figures:
        parts += ["", "## Figures", ""]
        parts += [f"![{name[:-4].replace('_', ' ')}]({name})" for name in figures]
    failed = runs.runs[runs.runs["status"] == "FAILED"]
    if len(failed):
        parts += ["", "## Failed runs", ""]
        parts += [f"- {r.dataset} / {r.detector} / seed {r.seed}: {r.error}" for r in failed.itertuples()]
    parts += ["", "## Caution", "", CAUTION, ""]
    text = "\n".join(parts)
    result = {"memo.md": out / "memo.md"}
    result["memo.md"].write_text(text)
    if html:
        result["memo.html"] = out / "memo.html"
        result["memo.html"].write_text(_to_html(text))
    return result


def _to_html(markdown: str) -> str:
    """A small converter for the memo's own Markdown (headings, lists, tables, images, bold, code)."""
    import re

    def inline(text: str) -> str:
        text = html.escape(text)
        text = re.sub(r"\*\*(.+?)\*\*", r"<strong>\1</strong>", text)
        return re.sub(r"`(.+?)`", r"<code>\1</code>", text)

    body, in_list, table_rows = [], False, []

    def flush_table():
        if not table_rows:
            return
        header, *rest = [r for r in table_rows if not re.match(r"^\|[-:| ]+\|$", r)]
        cells = lambda row: [c.strip() for c in row.strip("|").split("|")]
        body.append("<table><thead><tr>" + "".join(f"<th>{inline(c)}</th>" for c in cells(header)) + "</tr></thead><tbody>")
        body.extend("<tr>" + "".join(f"<td>{inline(c)}</td>" for c in cells(r)) + "</tr>" for r in rest)
        body.append("</tbody></table>")
        table_rows.clear()

    for line in markdown.splitlines():
        if line.startswith("|"):
            table_rows.append(line)
            continue
        flush_table()
        if line.startswith("- ") or line.startswith("  - "):
            if not in_list:
                body.append("<ul>")
                in_list = True
            body.append(f"<li>{inline(line.strip()[2:])}</li>")
            continue
        if in_list:
            body.append("</ul>")
            in_list = False
        if line.startswith("#"):
            level = len(line) - len(line.lstrip("#"))
            body.append(f"<h{level}>{inline(line.lstrip('#').strip())}</h{level}>")
        elif line.startswith("!["):
            alt, src = re.match(r"!\[(.*)\]\((.*)\)", line).groups()
            body.append(f'<p><img src="{html.escape(src)}" alt="{html.escape(alt)}" style="max-width:100%"></p>')
        elif line.strip():
            body.append(f"<p>{inline(line)}</p>")
    flush_table()
    if in_list:
        body.append("</ul>")
    style = ("body{font-family:sans-serif;max-width:60em;margin:2em auto;line-height:1.4}"
             "table{border-collapse:collapse;font-size:0.85em}td,th{border-bottom:1px solid #ccc;padding:2px 6px}")
    return f"<!doctype html><html><head><meta charset='utf-8'><title>evenflag memo</title><style>{style}</style></head><body>\n" \
           + "\n".join(body) + "\n</body></html>\n"
