"""Summary tables: runs aggregated over seeds, as Markdown, LaTeX and CSV.

Each cell is the mean over seeds with a 95% confidence interval from the t
distribution over seeds (mean +/- t * sd / sqrt(n)); ``n`` counts finished
seeds. Cells whose runs failed are kept and say so.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

DEFAULT_METRICS = ["auroc", "average_precision", "flag_rate_ratio", "score_distance", "false_flag_gap",
                   "leakage_auroc"]
HEADERS = {
    "auroc": "AUROC", "average_precision": "avg. precision", "flag_rate_ratio": "flag-rate ratio",
    "score_distance": "score distance", "false_flag_gap": "false-flag gap", "leakage_auroc": "leakage AUROC",
    "flag_rate_gap": "flag-rate gap", "hit_rate_gap": "hit-rate gap", "score_ks": "score KS",
    "group_auroc_gap": "group AUROC gap", "flag_f1": "flag F1",
}
# Which direction is better; leakage is best at 0.5 (no group information).
HIGHER_BETTER = {"auroc", "average_precision", "flag_rate_ratio", "flag_f1", "flag_precision", "flag_recall",
                 "precision_at_k", "four_fifths_pass"}
CLOSER_TO_HALF = {"leakage_auroc"}


def aggregate(runs: pd.DataFrame, metrics: list[str]) -> pd.DataFrame:
    """One row per (dataset, detector, weight): mean, sd, ci (half-width), n per metric,
    plus the number of finished and failed runs."""
    from scipy import stats

    keys = ["dataset", "detector", "weight"]
    frame = runs.copy()
    frame["weight"] = frame["weight"].fillna(-1.0)  # keep cells without a weight in groupby
    rows = []
    for key, cell in frame.groupby(keys, sort=True, dropna=False):
        finished = cell[cell["status"] == "FINISHED"]
        row = dict(zip(keys, key))
        row["n_finished"] = len(finished)
        row["n_failed"] = int((cell["status"] == "FAILED").sum())
        row["seeds"] = ",".join(str(s) for s in sorted(finished["seed"]))
        row["errors"] = "; ".join(sorted(set(cell.loc[cell["status"] == "FAILED", "error"].astype(str))))[:300]
        for metric in metrics:
            values = finished[metric].to_numpy(dtype=float) if metric in finished else np.array([])
            values = values[np.isfinite(values)]
            n = len(values)
            mean = values.mean() if n else np.nan
            sd = values.std(ddof=1) if n > 1 else np.nan
            half = stats.t.ppf(0.975, n - 1) * sd / np.sqrt(n) if n > 1 else np.nan
            row.update({f"{metric}.mean": mean, f"{metric}.sd": sd, f"{metric}.ci": half, f"{metric}.n": n})
        rows.append(row)
    table = pd.DataFrame(rows)
    table["weight"] = table["weight"].replace(-1.0, np.nan)
    return table


def _best(table: pd.DataFrame, metric: str) -> pd.Series:
    """True where the cell is the best of its dataset for this metric."""
    values = table[f"{metric}.mean"]
    if metric in CLOSER_TO_HALF:
        score = -(values - 0.5).abs()
    elif metric in HIGHER_BETTER:
        score = values
    else:
        score = -values
    best = score.groupby(table["dataset"]).transform("max")
    return (score == best) & score.notna()


def _cell(row, metric) -> str:
    mean, half = row[f"{metric}.mean"], row[f"{metric}.ci"]
    if row["n_finished"] == 0:
        return "failed" if row["n_failed"] else "missing"
    if not np.isfinite(mean):
        return "n/a"
    return f"{mean:.3f} ± {half:.3f}" if np.isfinite(half) else f"{mean:.3f}"


def _columns(table, metrics):
    show_weight = table["weight"].notna().any()
    return show_weight, [m for m in metrics if f"{m}.mean" in table and table[f"{m}.n"].sum() > 0]


def to_markdown(table: pd.DataFrame, metrics: list[str]) -> str:
    show_weight, metrics = _columns(table, metrics)
    best = {m: _best(table, m) for m in metrics}
    header = ["dataset", "detector"] + (["weight"] if show_weight else []) + ["seeds (failed)"] + [HEADERS.get(m, m) for m in metrics]
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join(["---"] * 2 + (["---:"] if show_weight else []) + ["---:"] * (1 + len(metrics))) + "|"]
    for i, row in table.iterrows():
        cells = [row["dataset"], row["detector"]]
        if show_weight:
            cells.append("" if pd.isna(row["weight"]) else f"{row['weight']:g}")
        cells.append(f"{row['n_finished']}" + (f" ({row['n_failed']})" if row["n_failed"] else ""))
        for m in metrics:
            text = _cell(row, m)
            cells.append(f"**{text}**" if best[m].loc[i] and table["dataset"].eq(row["dataset"]).sum() > 1 else text)
        lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines) + "\n"


def _tex(text: str) -> str:
    return (str(text).replace("\\", r"\textbackslash{}").replace("_", r"\_").replace("&", r"\&")
            .replace("%", r"\%").replace("#", r"\#").replace("±", r"$\pm$"))


def to_latex(table: pd.DataFrame, metrics: list[str], caption: str, label: str = "tab:evenflag") -> str:
    show_weight, metrics = _columns(table, metrics)
    best = {m: _best(table, m) for m in metrics}
    header = ["dataset", "detector"] + (["weight"] if show_weight else []) + ["seeds"] + [HEADERS.get(m, m) for m in metrics]
    spec = "ll" + ("r" if show_weight else "") + "r" + "r" * len(metrics)
    out = [r"\begin{table}[t]", r"\centering", f"\\caption{{{_tex(caption)}}}", f"\\label{{{label}}}",
           f"\\begin{{tabular}}{{{spec}}}", r"\toprule", " & ".join(_tex(h) for h in header) + r" \\", r"\midrule"]
    previous = None
    for i, row in table.iterrows():
        if previous is not None and row["dataset"] != previous:
            out.append(r"\addlinespace")
        previous = row["dataset"]
        cells = [_tex(row["dataset"]), _tex(row["detector"])]
        if show_weight:
            cells.append("" if pd.isna(row["weight"]) else f"{row['weight']:g}")
        cells.append(f"{row['n_finished']}" + (f" ({row['n_failed']} failed)" if row["n_failed"] else ""))
        for m in metrics:
            text = _tex(_cell(row, m))
            cells.append(f"\\textbf{{{text}}}" if best[m].loc[i] and table["dataset"].eq(row["dataset"]).sum() > 1 else text)
        out.append(" & ".join(cells) + r" \\")
    out += [r"\bottomrule", r"\end{tabular}", r"\end{table}"]
    return "\n".join(out) + "\n"


def to_csv(table: pd.DataFrame) -> str:
    return table.to_csv(index=False, float_format="%.6g")
