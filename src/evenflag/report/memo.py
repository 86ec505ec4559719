"""The memo: one Markdown file (optionally HTML) a reviewer can read start to end."""

from __future__ import annotations

import html
from pathlib import Path

import numpy as np
import pandas as pd

from evenflag.metrics.facts import FOUR_FIFTHS, direction_word
from evenflag.metrics.keys import group_from_key
from evenflag.report.collect import RunTable
from evenflag.report.stats import cd_diagram_reason, wilcoxon_datasets

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
             f"- runs counted: {len(frame)} ({int((frame['status'] == 'FINISHED').sum())} finished, "
             f"{int((frame['status'] == 'FAILED').sum())} failed; one run per configuration and seed)",
             f"- seeds: {', '.join(map(str, sorted(set(frame['seed']))))}",
             f"- protocol: {', '.join(sorted(set(frame['protocol'])))}; threshold: {', '.join(sorted(set(frame['threshold'])))}",
             f"- code version (git commit): {', '.join(sorted(set(c[:12] for c in frame['git_commit'] if c)))}"]
    audits = frame[frame["kind"] == "audit"] if "kind" in frame else frame.iloc[:0]
    if len(audits):
        lines.append("- audited files (scores exported from a deployed detector, not trained here):")
        for _, row in audits.iterrows():
            periods = f"; periods {row['audit_periods'].replace('..', ' to ')}" if row["audit_periods"] else ""
            lines.append(f"  - `{row['audit_file']}`: {int(row['audit_rows'] or 0):,} rows, sha256 `{row['data_sha256']}`"
                         f"{periods}; labels known: {row['labels_known'] or 'n/a'} (run {row['run_id'][:8]})")
    lines.append("- datasets (sha256 of the raw bytes):")
    for dataset, rows in frame.groupby("dataset"):
        hashes = sorted(set(rows["data_sha256"]))
        groups = sorted(set(g for g in rows["groups"] if g))
        lines.append(f"  - `{dataset}`: {', '.join(f'`{h}`' for h in hashes)}; groups: {'; '.join(groups)}")
        lines.extend(f"    - {line}" for line in base_rate_lines(rows))
    return lines


def base_rate_lines(rows: pd.DataFrame) -> list[str]:
    """Anomaly base rate per group in the whole dataset and in the test rows
    (mean over runs), per protocol: subsampling must not change their ratio."""
    out = []
    natural = sorted(set(v for v in rows.get("natural_base_rates", pd.Series(dtype=str)) if v))
    if natural:
        out.append(f"base rates in the dataset: {natural[0]}")
    columns = [c for c in rows.columns if c.startswith("base_rate/") and "." not in c.split("/", 1)[1]]
    for protocol, part in rows[rows["status"] == "FINISHED"].groupby("protocol"):
        shown = [f"{group_from_key(c.split('/', 1)[1])}={part[c].mean():.4f}" for c in columns if part[c].notna().any()]
        if shown:
            out.append(f"base rates in the test rows ({protocol}): {', '.join(shown)}")
    return out


def reading(runs: RunTable, table: pd.DataFrame) -> list[str]:
    """Plain-language sentences generated from the aggregated numbers."""
    from evenflag.report.figures import method_label

    out = []
    table = table.assign(method=method_label(table))
    for dataset, cells in table.groupby("dataset"):
        cells = cells[cells["n_finished"] > 0]
        if cells.empty:
            continue
        if "auroc.mean" in cells and cells["auroc.mean"].notna().any():
            best = cells.loc[cells["auroc.mean"].idxmax()]
            sentence = f"On **{dataset}**, {best['method']} has the highest mean AUROC ({_fmt(best['auroc.mean'])})."
        elif "flag_rate_ratio.mean" in cells:  # audits without labels: who is flagged is all there is
            sentence = f"On **{dataset}** (no AUROC: it needs the outcome of every row)."
        else:
            continue
        if "flag_rate_ratio.mean" in cells:
            below = cells[cells["flag_rate_ratio.mean"] < FOUR_FIFTHS]
            if len(below):
                sentence += (f" Mean flag-rate ratios below the four-fifths line ({FOUR_FIFTHS}): "
                             f"{', '.join(sorted(below['method']))} (lowest {_fmt(below['flag_rate_ratio.mean'].min())}).")
            else:
                sentence += f" Every mean flag-rate ratio is at or above {FOUR_FIFTHS}."
        out.append(sentence)
    return out


def difference_lines(runs: RunTable) -> list[str]:
    """Per cell: each group's flag rate minus the reference group's, and how
    many seeds' own 95% intervals exclude 0 (a disparity the run can tell from
    chance) or are marked degenerate (resting on a group with no flags)."""
    from evenflag.report.figures import method_label

    frame = runs.runs[runs.runs["status"] == "FINISHED"]
    columns = [c for c in frame.columns if c.startswith("flag_rate_diff/") and "." not in c.split("/", 1)[1]]
    if not columns:
        return []
    frame = frame.assign(method=method_label(frame))
    lines = []
    for (dataset, method), part in frame.groupby(["dataset", "method"]):
        pieces = []
        for column in columns:
            values = part[column]
            if values.notna().sum() == 0:
                continue
            low = part.get(f"{column}.ci_low", pd.Series(np.nan, index=part.index))
            high = part.get(f"{column}.ci_high", pd.Series(np.nan, index=part.index))
            with_interval = int((low.notna() & high.notna()).sum())
            piece = f"{group_from_key(column.split('/', 1)[1])} {values.mean():+.3f}"
            if with_interval == 0:
                piece += " (no per-run intervals: the runs used metrics.bootstrap=0)"
            else:
                excluded = int(((low > 0) | (high < 0)).sum())
                marked = int(part.get(f"{column}.ci_degenerate", pd.Series(dtype=float)).fillna(0).sum())
                piece += f" (intervals excluding 0 in {excluded} of {with_interval} seeds"
                piece += f"; {marked} marked degenerate)" if marked else ")"
            pieces.append(piece)
        if pieces:
            reference = sorted(set(part.get("reference_group", pd.Series(["?"])).dropna()))
            lines.append(f"- {dataset} / {method} (against {', '.join(reference) or '?'}): {'; '.join(pieces)}")
    return lines


# Fairness-aware training: wrappers named before their base, and detectors whose
# plain base is fixed by the method (FairOD is an autoencoder trained with two extra terms).
FAIR_WRAPPERS = ("adversarial", "distribution_matching")
FAIR_DETECTOR_BASE = {"fairod": "autoencoder"}


def variant_pairs(methods: list[str]) -> list[tuple[str, str]]:
    """(fairness variant, its plain base) pairs among method labels:
    'adversarial deep_svdd w=1' and 'deep_svdd + group_balanced' against
    'deep_svdd'; in a weight sweep without the plain base, each weight against
    weight 0.

    Examples
    --------
    >>> variant_pairs(["deep_svdd", "adversarial deep_svdd", "deep_svdd + group_balanced"])
    [('adversarial deep_svdd', 'deep_svdd'), ('deep_svdd + group_balanced', 'deep_svdd')]
    >>> variant_pairs(["adversarial deep_svdd w=0", "adversarial deep_svdd w=1"])
    [('adversarial deep_svdd w=1', 'adversarial deep_svdd w=0')]
    >>> variant_pairs(["autoencoder", "fairod", "deep_svdd", "distribution_matching deep_svdd"])
    [('fairod', 'autoencoder'), ('distribution_matching deep_svdd', 'deep_svdd')]
    """
    import re

    pairs = []
    for method in methods:
        settings = re.search(r" \[.*\]$", method)
        suffix = settings.group(0) if settings else ""
        core = method[: len(method) - len(suffix)]
        plain = re.sub(r" w=[^ ]+$", "", core.split(" + ")[0])
        wrapper = plain.split(" ", 1)[0]
        if wrapper in FAIR_WRAPPERS and " " in plain:  # 'distribution_matching deep_svdd' -> 'deep_svdd'
            plain = plain.split(" ", 1)[1]
        plain = FAIR_DETECTOR_BASE.get(plain, plain)
        for base in (plain + suffix, re.sub(r" w=[^ ]+$", " w=0", core) + suffix):
            if base != method and base in methods:
                pairs.append((method, base))
                break
    return pairs


def comparison_lines(table: pd.DataFrame, metrics=("auroc", "flag_rate_ratio", "leakage_auroc")) -> list[str]:
    """Friedman tests over datasets and Wilcoxon tests of each fairness variant
    against its base, both on dataset-level means (datasets are the blocks)."""
    from evenflag.report.figures import friedman_for, method_matrix

    lines = []
    for metric in metrics:
        if f"{metric}.mean" not in table or table[f"{metric}.mean"].isna().all():
            continue
        result = friedman_for(table, metric)
        if result is not None:
            ranks = ", ".join(f"{m} {r:.2f}" for m, r in sorted(zip(result.methods, result.mean_ranks), key=lambda t: t[1]))
            f_text = f"{result.f_f:.2f}" if np.isfinite(result.f_f) else "undefined (rankings agree perfectly)"
            line = (f"- {metric.replace('_', ' ')} ({direction_word(metric)}): mean ranks {ranks}; Friedman "
                    f"chi2_F = {result.chi2_f:.2f} (tie-corrected), p = {result.p_value:.3g} ({result.p_method}) "
                    f"over {result.n_datasets} datasets; Iman-Davenport F_F = {f_text}; Nemenyi CD = "
                    f"{result.critical_difference:.2f} at alpha 0.05.")
            reason = cd_diagram_reason(result)
            if metric == "auroc":
                line += (" No critical-difference diagram: " + reason + "." if reason
                         else " The critical-difference diagram is drawn.")
            lines.append(line)
        matrix = method_matrix(table, metric)
        for variant, base in variant_pairs(list(matrix.columns)):
            test = wilcoxon_datasets(matrix, variant, base)
            if test["n"] < 2:
                continue
            verdict = (f"p = {test['p_value']:.3g}" if np.isfinite(test["p_value"]) else "no test")
            floor = (f"; with {test['n']} datasets no two-sided p below {test['smallest_p']:.3g} is possible"
                     if test["smallest_p"] > 0.05 else "")
            lines.append(f"- {metric.replace('_', ' ')}, {variant} against {base}: median difference of dataset "
                         f"means {test['median_difference']:+.3f} over {test['n']} datasets (Wilcoxon signed-rank "
                         f"{verdict}{floor}).")
    return lines


PAIRED_METRICS = ("leakage_auroc", "flag_rate_ratio", "auroc")


def paired_seed_differences(runs: RunTable, metrics=PAIRED_METRICS) -> pd.DataFrame:
    """Per dataset, each fairness variant minus its plain base, paired by seed
    (a pair shares the split and the initial seed), with a 95% t-interval of the
    mean difference over the paired seeds. One row per dataset, pair and metric."""
    from scipy import stats

    from evenflag.report.figures import method_label

    frame = runs.runs[runs.runs["status"] == "FINISHED"]
    frame = frame.assign(method=method_label(frame))
    rows = []
    for dataset, part in frame.groupby("dataset"):
        for variant, base in variant_pairs(sorted(set(part["method"]))):
            for metric in metrics:
                if metric not in part:
                    continue
                a = part[part["method"] == variant].set_index("seed")[metric]
                b = part[part["method"] == base].set_index("seed")[metric]
                diff = (a - b).dropna()
                n = len(diff)
                if n < 2:
                    continue
                mean, sd = float(diff.mean()), float(diff.std(ddof=1))
                half = float(stats.t.ppf(0.975, n - 1)) * sd / np.sqrt(n)
                rows.append({"dataset": dataset, "variant": variant, "base": base, "metric": metric, "n": n,
                             "difference": mean, "low": mean - half, "high": mean + half})
    return pd.DataFrame(rows)


def paired_seed_lines(runs: RunTable) -> list[str]:
    """The memo's per-method verdicts: did the variant lower the leakage and raise
    the flag-rate ratio beyond seed noise (interval excluding 0), at what AUROC cost."""
    table = paired_seed_differences(runs)
    if table.empty:
        return []
    names = {"leakage_auroc": "leakage", "flag_rate_ratio": "flag-rate ratio", "auroc": "AUROC"}
    wanted = {"leakage_auroc": "lower", "flag_rate_ratio": "higher", "auroc": "higher"}
    lines = []
    for (dataset, variant, base), part in table.groupby(["dataset", "variant", "base"], sort=True):
        pieces = []
        for row in part.itertuples():
            moved = "higher" if row.low > 0 else "lower" if row.high < 0 else None
            verdict = (f"{moved} beyond seed noise" if moved else "within seed noise")
            mark = "" if moved is None else (" (the better direction)" if moved == wanted[row.metric]
                                             else " (the worse direction)")
            pieces.append(f"{names[row.metric]} {row.difference:+.3f} [{row.low:+.3f}, {row.high:+.3f}], "
                          f"{verdict}{mark}")
        lines.append(f"- {dataset} / {variant} against {base} ({int(part['n'].max())} paired seeds): "
                     + "; ".join(pieces))
    summary = []
    for variant_base, part in table.groupby(table["variant"] + " against " + table["base"]):
        counts = []
        for metric, direction in (("leakage_auroc", "lower"), ("flag_rate_ratio", "higher")):
            rows = part[part["metric"] == metric]
            if len(rows):
                good = int((rows["high"] < 0).sum() if direction == "lower" else (rows["low"] > 0).sum())
                bad = int((rows["low"] > 0).sum() if direction == "lower" else (rows["high"] < 0).sum())
                counts.append(f"{names[metric]} {direction} beyond seed noise on {good} of {len(rows)} datasets"
                              + (f" ({bad} the other way)" if bad else ""))
        cost = part[part["metric"] == "auroc"]["difference"]
        if len(cost):
            counts.append(f"median AUROC change {cost.median():+.3f}")
        summary.append(f"- **{variant_base}**: " + "; ".join(counts) + ".")
    return summary + ["", "Per dataset (mean paired difference with its 95% t-interval over seeds):", ""] + lines


def seed_spread_lines(table: pd.DataFrame, metrics=("auroc", "flag_rate_ratio")) -> list[str]:
    out = []
    for metric in metrics:
        if f"{metric}.sd" in table and table[f"{metric}.sd"].notna().any():
            sd = table[f"{metric}.sd"]
            out.append(f"- {metric.replace('_', ' ')}: standard deviation over seeds within a cell, median "
                       f"{sd.median():.3f} (range {sd.min():.3f} to {sd.max():.3f}).")
    return out


def write_memo(runs: RunTable, table: pd.DataFrame, request, written: dict, html: bool = False) -> dict[str, Path]:
    out = Path(request.out)
    figures = [name for name in ("tradeoff.png", "search_front.png", "flag_rates.png", "score_ecdf.png",
                                 "critical_difference.png") if name in written]
    parts = [f"# Flagging review: {', '.join(runs.studies)}", "", "## What was run", *metadata_lines(runs), "",
             "## Main table", "", "One row per configuration (runs that differ in any setting but the seed never "
             "share a row; `settings` names what tells rows apart). Mean over seeds with the half-width of a 95% "
             "t-interval over seeds, clipped to the metric's range (then shown as [low, high]); bold only where "
             "a row's interval is separated from every other row of its dataset in the better direction; "
             "`failed`/`missing` mark cells without results.", "",
             (out / "table.md").read_text().split("\n> ")[0], "## Reading", ""]
    parts += [f"- {line}" for line in reading(runs, table)] or ["- (no finished runs)"]
    if "pareto.md" in written:
        parts += ["", "## Search: Pareto-optimal configurations", "", written["pareto.md"].read_text().strip()]
    differences = difference_lines(runs)
    if differences:
        parts += ["", "## Flag rates against the reference group", "",
                  "Each group's flag rate minus the reference group's (mean over seeds). Every run has its own 95% "
                  "interval for this difference (bootstrap with the threshold set again in every resample, or "
                  "Newcombe's score interval where counts are small); the count says in how many seeds it "
                  "excluded 0. A marked interval rests on a group with no flags and is not a precise value.", "",
                  *differences]
    comparisons = comparison_lines(table)
    parts += ["", "## Comparison across datasets", "",
              "Methods are compared on their mean over seeds in each dataset: datasets are the independent "
              "units, seeds are not.", ""]
    parts += comparisons or ["- No test: a comparison needs at least 2 datasets with results for every method "
                             "compared (3 methods for the Friedman test)."]
    paired = paired_seed_lines(runs)
    if paired:
        parts += ["", "## Each fairness variant against its plain base", "",
                  "Within each dataset, a variant minus its base on the same seeds (the same split and initial "
                  "seed), with a 95% t-interval over the paired seeds. \"Beyond seed noise\" means the interval "
                  "excludes 0; with 3 to 5 seeds a real but small change can still fall within it.", "", *paired]
    spread = seed_spread_lines(table)
    if spread:
        parts += ["", "## Spread over seeds", "", *spread]
    if figures:
        parts += ["", "## Figures", ""]
        parts += [f"![{name[:-4].replace('_', ' ')}]({name})" for name in figures]
    if getattr(request, "note", None):
        parts += ["", "## Notes from the authors", "", request.note.strip()]
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
