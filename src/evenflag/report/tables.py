"""Summary tables: runs aggregated over seeds, as Markdown, LaTeX and CSV.

A row is one cell: one resolved configuration up to the seed (see
collect.py); ``settings`` names the config keys that tell cells of the same
dataset, detector and weight apart. Each entry is the mean over finished seeds
with the half-width of a 95% confidence interval from the t distribution over
seeds (mean +/- t * sd / sqrt(n)); ``n`` counts finished seeds. Intervals that
would leave the metric's range are clipped to it and then shown as
``[low, high]``; a cell whose seeds all gave the same value says so instead of
showing a zero-width interval. A value is bold only when its interval does not
overlap the interval of any other row of the same dataset in the direction
that is better (named in the header). Cells whose runs failed are kept and say
so.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from evenflag.metrics.facts import better_score, fact, header

DEFAULT_METRICS = ["auroc", "average_precision", "flag_rate_ratio", "score_distance", "false_flag_gap",
                   "leakage_auroc"]
ROW_KEYS = ["dataset", "detector", "weight", "settings"]


def aggregate(runs: pd.DataFrame, metrics: list[str]) -> pd.DataFrame:
    """One row per cell: mean, sd, ci (half-width), low, high (clipped), n per
    metric, plus the number of finished and failed runs."""
    from scipy import stats

    frame = runs.copy()
    if "settings" not in frame:
        frame["settings"] = ""
    if "cell_id" not in frame:
        frame["cell_id"] = ["|".join(map(str, key)) for key in frame[ROW_KEYS].itertuples(index=False)]
    rows = []
    for _, cell in frame.groupby("cell_id", sort=False):
        finished = cell[cell["status"] == "FINISHED"]
        first = cell.iloc[0]
        row = {key: first[key] for key in ROW_KEYS}
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
            found = fact(metric)
            low_limit, high_limit = (found.low, found.high) if found else (-np.inf, np.inf)
            row.update({f"{metric}.mean": mean, f"{metric}.sd": sd, f"{metric}.ci": half, f"{metric}.n": n,
                        f"{metric}.low": max(mean - half, low_limit) if np.isfinite(half) else np.nan,
                        f"{metric}.high": min(mean + half, high_limit) if np.isfinite(half) else np.nan})
        rows.append(row)
    table = pd.DataFrame(rows)
    order = table["weight"].fillna(-1.0)
    table = table.assign(_w=order).sort_values(["dataset", "detector", "_w", "settings"]).drop(columns="_w")
    return table.reset_index(drop=True)


def separated_best(table: pd.DataFrame, metric: str) -> pd.Series:
    """True where a row is the best of its dataset and its interval lies wholly
    on the better side of every other row's interval (no overlap)."""
    out = pd.Series(False, index=table.index)
    for _, part in table.groupby("dataset"):
        part = part[part[f"{metric}.mean"].notna()]
        if len(part) < 2:
            continue
        goodness = better_score(metric, part[f"{metric}.mean"])
        best = goodness.idxmax()
        low = part[f"{metric}.low"].fillna(part[f"{metric}.mean"])
        high = part[f"{metric}.high"].fillna(part[f"{metric}.mean"])
        if part.loc[best, "n_finished"] < 2:
            continue  # one seed: no interval to separate
        others = part.index != best
        found = fact(metric)
        if found is not None and found.better == "lower":
            separated = (high[best] < low[others]).all()
        elif found is not None and found.better == "parity":
            parity = found.parity if found.parity is not None else 0.0
            distance_high = np.maximum(np.abs(low - parity), np.abs(high - parity))
            distance_low = np.where((low <= parity) & (parity <= high), 0.0, np.minimum(np.abs(low - parity), np.abs(high - parity)))
            separated = (distance_high[best] < np.asarray(distance_low)[others]).all()
        else:
            separated = (low[best] > high[others]).all()
        out.loc[best] = bool(separated)
    return out


def cell_text(row, metric) -> str:
    mean, half = row[f"{metric}.mean"], row[f"{metric}.ci"]
    if row["n_finished"] == 0:
        return "failed" if row["n_failed"] else "missing"
    if not np.isfinite(mean):
        return "n/a"
    if row[f"{metric}.n"] > 1 and row[f"{metric}.sd"] == 0:
        return f"{mean:.3f} (all seeds equal)"
    if not np.isfinite(half):
        return f"{mean:.3f}"
    low, high = row[f"{metric}.low"], row[f"{metric}.high"]
    if low > mean - half + 1e-12 or high < mean + half - 1e-12:
        return f"{mean:.3f} [{low:.3f}, {high:.3f}]"
    return f"{mean:.3f} ± {half:.3f}"


def _columns(table, metrics):
    show_weight = table["weight"].notna().any()
    show_settings = table["settings"].astype(bool).any()
    return show_weight, show_settings, [m for m in metrics if f"{m}.mean" in table and table[f"{m}.n"].sum() > 0]


def to_markdown(table: pd.DataFrame, metrics: list[str]) -> str:
    show_weight, show_settings, metrics = _columns(table, metrics)
    best = {m: separated_best(table, m) for m in metrics}
    names = ["dataset", "detector"] + (["weight"] if show_weight else []) + (["settings"] if show_settings else [])
    head = names + ["seeds (failed)"] + [header(m) for m in metrics]
    align = ["---"] * 2 + (["---:"] if show_weight else []) + (["---"] if show_settings else []) + ["---:"] * (1 + len(metrics))
    lines = ["| " + " | ".join(head) + " |", "|" + "|".join(align) + "|"]
    for i, row in table.iterrows():
        cells = [row["dataset"], row["detector"]]
        if show_weight:
            cells.append("" if pd.isna(row["weight"]) else f"{row['weight']:g}")
        if show_settings:
            cells.append(row["settings"])
        cells.append(f"{row['n_finished']}" + (f" ({row['n_failed']})" if row["n_failed"] else ""))
        for m in metrics:
            text = cell_text(row, m)
            cells.append(f"**{text}**" if best[m].loc[i] else text)
        lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines) + "\n"


def _tex(text: str) -> str:
    return (str(text).replace("\\", r"\textbackslash{}").replace("_", r"\_").replace("&", r"\&")
            .replace("%", r"\%").replace("#", r"\#").replace("±", r"$\pm$")
            .replace("↑", r"$\uparrow$").replace("↓", r"$\downarrow$").replace("→", r"$\to$").replace("…", r"\ldots{}"))


def to_latex(table: pd.DataFrame, metrics: list[str], caption: str, label: str = "tab:evenflag") -> str:
    show_weight, show_settings, metrics = _columns(table, metrics)
    best = {m: separated_best(table, m) for m in metrics}
    head = (["dataset", "detector"] + (["weight"] if show_weight else []) + (["settings"] if show_settings else [])
            + ["seeds"] + [header(m) for m in metrics])
    spec = "ll" + ("r" if show_weight else "") + ("l" if show_settings else "") + "r" + "r" * len(metrics)
    out = [r"\begin{table}[t]", r"\centering", f"\\caption{{{_tex(caption)}}}", f"\\label{{{label}}}",
           f"\\begin{{tabular}}{{{spec}}}", r"\toprule", " & ".join(_tex(h) for h in head) + r" \\", r"\midrule"]
    previous = None
    for i, row in table.iterrows():
        if previous is not None and row["dataset"] != previous:
            out.append(r"\addlinespace")
        previous = row["dataset"]
        cells = [_tex(row["dataset"]), _tex(row["detector"])]
        if show_weight:
            cells.append("" if pd.isna(row["weight"]) else f"{row['weight']:g}")
        if show_settings:
            cells.append(_tex(row["settings"]))
        cells.append(f"{row['n_finished']}" + (f" ({row['n_failed']} failed)" if row["n_failed"] else ""))
        for m in metrics:
            text = _tex(cell_text(row, m))
            cells.append(f"\\textbf{{{text}}}" if best[m].loc[i] else text)
        out.append(" & ".join(cells) + r" \\")
    out += [r"\bottomrule", r"\end{tabular}", r"\end{table}"]
    return "\n".join(out) + "\n"


def to_csv(table: pd.DataFrame) -> str:
    return table.to_csv(index=False, float_format="%.6g")
