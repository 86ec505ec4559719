"""Figures in our own plain style: PNG and SVG, readable in greyscale
(markers, hatching and line styles carry the distinctions, not colour)."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd

from evenflag.metrics.facts import FOUR_FIFTHS, better_score, fact
from evenflag.metrics.keys import group_from_key
from evenflag.report.collect import RunTable
from evenflag.report.stats import cd_diagram_reason

LINESTYLES = ["-", "--", ":", "-."]
MARKERS = ["o", "s", "^", "D", "v", "P", "X", "*"]
HATCHES = ["", "//", "..", "xx", "\\\\", "--", "++", "oo"]


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    plt.rcParams.update({
        "font.size": 9, "axes.spines.top": False, "axes.spines.right": False, "axes.grid": True,
        "grid.color": "0.88", "grid.linewidth": 0.6, "axes.prop_cycle": plt.cycler(color=["0.1", "0.45", "0.65", "0.3"]),
        "svg.hashsalt": "evenflag", "svg.fonttype": "none",
    })
    return plt


def _save(fig, out: Path, name: str) -> dict[str, Path]:
    paths = {}
    for ext in ("png", "svg"):
        path = out / f"{name}.{ext}"
        fig.savefig(path, dpi=150, bbox_inches="tight", metadata={"Date": None} if ext == "svg" else None)
        paths[f"{name}.{ext}"] = path
    return paths


def clipped_errors(mean, half, low=0.0, high=1.0):
    """Asymmetric error bars of mean +/- half, clipped to a metric's range
    (a t-interval over few seeds can cross 0 or 1; the metric cannot)."""
    mean = np.asarray(mean, dtype=float)
    half = np.nan_to_num(np.asarray(half, dtype=float))
    return np.vstack([np.minimum(half, mean - low), np.minimum(half, high - mean)]).clip(min=0)


def pareto_front(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Indices of points not dominated when both coordinates are to be maximised,
    ordered by x.

    Examples
    --------
    >>> pareto_front(np.array([0.9, 0.8, 0.7, 0.85]), np.array([0.5, 0.7, 0.9, 0.4])).tolist()
    [2, 1, 0]
    """
    keep = []
    for i in range(len(x)):
        dominated = np.any((x >= x[i]) & (y >= y[i]) & ((x > x[i]) | (y > y[i])))
        if not dominated and np.isfinite(x[i]) and np.isfinite(y[i]):
            keep.append(i)
    return np.array(sorted(keep, key=lambda i: x[i]), dtype=int)


def tradeoff_figure(table: pd.DataFrame, out: Path, detection: str = "auroc", fairness: str = "flag_rate_ratio"):
    """Fairness against detection over the adversary's weight, one panel per dataset."""
    cells = table[table["weight"].notna()]
    if cells.empty or f"{detection}.mean" not in cells or f"{fairness}.mean" not in cells:
        return {}
    if cells.groupby("dataset")["weight"].nunique().max() < 2:
        return {}  # one weight per dataset: nothing to trade off
    plt = _plt()
    datasets = sorted(cells["dataset"].unique())
    fig, axes = plt.subplots(1, len(datasets), figsize=(3.3 * len(datasets), 3.1), squeeze=False)
    labels = []
    for ax, dataset in zip(axes[0], datasets):
        part = cells[cells["dataset"] == dataset].sort_values("weight")
        x, y = part[f"{detection}.mean"].to_numpy(), part[f"{fairness}.mean"].to_numpy()
        ax.errorbar(x, y, xerr=clipped_errors(x, part[f"{detection}.ci"]), yerr=clipped_errors(y, part[f"{fairness}.ci"]),
                    fmt="o", color="0.45", ecolor="0.8", elinewidth=0.8, markersize=4, capsize=2,
                    label="weight (mean, 95% CI)")
        labels.append((ax, x, y, [f"w={w:g}" for w in part["weight"]]))
        front = pareto_front(x, y)
        if len(front):
            ax.plot(x[front], y[front], "-", color="0.1", linewidth=1.4, marker="D", markersize=5, label="Pareto front")
        ax.axhline(FOUR_FIFTHS, linestyle="--", color="0.3", linewidth=0.9, label=f"four-fifths line ({FOUR_FIFTHS:g})")
        ax.set_ylim(0, 1.04)
        ax.set_title(dataset)
        ax.set_xlabel(detection.replace("_", " "))
        ax.set_ylabel(fairness.replace("_", " "))
    axes[0][0].legend(loc="lower left", fontsize=7, frameon=False)
    fig.tight_layout()
    for ax, x, y, texts in labels:  # after the layout, so that no label moves once placed
        label_points(ax, x, y, texts)
    paths = _save(fig, out, "tradeoff")
    plt.close(fig)
    return paths


def label_points(ax, x, y, texts, fontsize: float = 7, gap: float = 2.0):
    """Annotate points so that no two labels overlap: each label starts to the
    upper right of its point and moves up (then down), in steps of its own
    height, until its box clears every label already placed; a moved label gets
    a thin leader line to its point."""
    from matplotlib.text import Text

    fig = ax.figure
    renderer = fig.canvas.get_renderer()
    placed = []
    order = np.argsort(np.asarray(y, dtype=float), kind="stable")
    annotations = [None] * len(texts)
    for i in order:
        for step in [0, *[s for k in range(1, 40) for s in (k, -k)]]:
            note = ax.annotate(texts[i], (x[i], y[i]), textcoords="offset points", xytext=(4, 3 + step * (fontsize + gap)),
                               fontsize=fontsize, arrowprops=None if step == 0 else
                               {"arrowstyle": "-", "color": "0.6", "linewidth": 0.5, "shrinkA": 0, "shrinkB": 2})
            note.update_positions(renderer)  # an annotation's place is computed only when drawn
            box = Text.get_window_extent(note, renderer)  # the words only, not the leader line
            if not any(box.overlaps(other) for other in placed):
                placed.append(box)
                annotations[i] = note
                break
            note.remove()
    return annotations


def _stacked(label: str) -> str:
    """'adversarial deep_svdd + group_balanced' -> one word per line, '+ x' kept together."""
    name, *extras = label.split(" + ")
    return "\n".join(name.split(" ") + [f"+ {extra}" for extra in extras])


def flag_rate_figure(runs: pd.DataFrame, out: Path):
    """Per-group flag rates (mean over seeds, 95% t-interval) per detector, with
    each detector's four-fifths line (0.8 x its highest group rate)."""
    from scipy import stats

    finished = runs[runs["status"] == "FINISHED"]
    finished = finished.assign(detector=method_label(finished))  # one bar group per cell, never pooled
    columns = [c for c in finished.columns if c.startswith("flag_rate/") and "." not in c.split("/", 1)[1]]
    if not columns:
        return {}
    plt = _plt()
    datasets = sorted(finished["dataset"].unique())
    fig, axes = plt.subplots(len(datasets), 1, figsize=(9, 2.6 * len(datasets)), squeeze=False)
    for ax, dataset in zip(axes[:, 0], datasets):
        part = finished[finished["dataset"] == dataset]
        groups = [c for c in columns if part[c].notna().any()]
        detectors = sorted(part["detector"].unique())
        width = 0.8 / max(len(groups), 1)
        for d_index, detector in enumerate(detectors):
            rows = part[part["detector"] == detector]
            means = []
            for g_index, column in enumerate(groups):
                values = rows[column].dropna().to_numpy()
                mean = values.mean() if len(values) else np.nan
                half = stats.t.ppf(0.975, len(values) - 1) * values.std(ddof=1) / np.sqrt(len(values)) if len(values) > 1 else 0
                means.append(mean)
                ax.bar(d_index + (g_index - (len(groups) - 1) / 2) * width, mean, width * 0.95,
                       yerr=clipped_errors([mean], [half]),
                       color="white", edgecolor="0.15", hatch=HATCHES[g_index % len(HATCHES)], capsize=2,
                       error_kw={"elinewidth": 0.8, "ecolor": "0.3"},
                       label=group_from_key(column.split("/", 1)[1]) if d_index == 0 else None)
            if np.isfinite(np.nanmax(means)) if len(means) else False:
                line = FOUR_FIFTHS * np.nanmax(means)
                ax.plot([d_index - 0.45, d_index + 0.45], [line, line], "--", color="0.1", linewidth=1,
                        label=f"{FOUR_FIFTHS:g} x highest rate" if d_index == 0 else None)
        ax.set_xticks(range(len(detectors)))
        ax.set_xticklabels([_stacked(d) for d in detectors], fontsize=7)
        ax.set_ylabel("flag rate")
        ax.set_title(f"{dataset}: mean over seeds; whiskers: 95% t-interval over seeds", loc="left", fontsize=8)
        ax.legend(fontsize=7, frameon=False, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    fig.tight_layout()
    paths = _save(fig, out, "flag_rates")
    plt.close(fig)
    return paths


def score_ecdf_figure(scores: pd.DataFrame, out: Path, title: str):
    """Per-group empirical CDFs of one run's test scores, on the pooled score
    quantile (the scale of ``score_distance``): readable whatever the detector's
    score range, and the area between two curves is the distance."""
    from scipy.stats import rankdata

    plt = _plt()
    fig, ax = plt.subplots(figsize=(4.6, 3.2))
    scores = scores.assign(quantile=rankdata(scores["score"], method="max") / len(scores))
    for i, (group, rows) in enumerate(sorted(scores.groupby("group"), key=lambda kv: str(kv[0]))):
        values = np.sort(rows["quantile"].to_numpy())
        ax.step(values, np.arange(1, len(values) + 1) / len(values), where="post", color="0.1",
                linestyle=LINESTYLES[i % len(LINESTYLES)], linewidth=1.3, label=f"{group} (n={len(values)})")
    flagged = scores.loc[scores["flag"], "quantile"]
    if len(flagged):
        ax.axvline(flagged.min(), color="0.5", linewidth=0.8, linestyle=":", label="flag threshold")
    ax.set_xlabel("pooled score quantile (1 = most anomalous)")
    ax.set_ylabel("share of group at or below")
    ax.set_title(title, fontsize=8)
    ax.legend(fontsize=7, frameon=False)
    fig.tight_layout()
    paths = _save(fig, out, "score_ecdf")
    plt.close(fig)
    return paths


def critical_difference_figure(result, out: Path, metric: str):
    """Mean ranks on a line (1 = best) with bars joining detectors whose mean
    ranks differ by less than the Nemenyi critical difference."""
    plt = _plt()
    order = np.argsort(result.mean_ranks)
    ranks = result.mean_ranks[order]
    names = [result.methods[i] for i in order]
    k = len(names)
    fig, ax = plt.subplots(figsize=(6.4, 1.0 + 0.2 * k))
    ax.set_xlim(0.8, k + 0.2)
    ax.set_ylim(-0.4 * ((k + 1) // 2) - 0.3, 1.75)
    ax.axis("off")
    ax.plot([1, k], [1, 1], color="0.1", linewidth=1)
    for r in range(1, k + 1):
        ax.plot([r, r], [1, 1.12], color="0.1", linewidth=1)
        ax.text(r, 1.2, str(r), ha="center", va="bottom", fontsize=8)
    cd = result.critical_difference
    ax.plot([1, 1 + cd], [1.5, 1.5], color="0.1", linewidth=2)
    ax.text(1 + cd / 2, 1.55, f"CD = {cd:.2f}", ha="center", va="bottom", fontsize=7)
    half = (k + 1) // 2
    for i, (name, rank) in enumerate(zip(names, ranks)):
        left = i < half
        y = -0.4 * (i + 1) if left else -0.4 * (k - i)
        x_text = 0.85 if left else k + 0.15
        ax.plot([rank, rank, x_text], [1, y, y], color="0.3", linewidth=0.8)
        ax.text(x_text, y, f"{name} ({rank:.2f})", ha="right" if left else "left", va="center", fontsize=7)
    # Cliques: maximal runs of detectors within CD of each other.
    level = 0
    for i in range(k):
        j = i
        while j + 1 < k and ranks[j + 1] - ranks[i] < cd:
            j += 1
        if j > i and (i == 0 or ranks[j] - ranks[i - 1] >= cd):
            y = 0.85 - 0.12 * level
            ax.plot([ranks[i] - 0.03, ranks[j] + 0.03], [y, y], color="0.1", linewidth=3)
            level += 1
    ax.set_title(f"Mean rank by {metric.replace('_', ' ')} over {result.n_datasets} datasets "
                 f"(Friedman p = {result.p_value:.3g}; Nemenyi, alpha 0.05)", fontsize=8, pad=14)
    paths = _save(fig, out, "critical_difference")
    plt.close(fig)
    return paths


def first_finished_scores(runs: RunTable, run_id: str | None = None, tries: int = 20):
    """The scores artifact of one run: the given one, or the first finished run
    (in dataset, detector, seed order) whose artifact can be read."""
    import tempfile

    from mlflow.exceptions import MlflowException
    from mlflow.tracking import MlflowClient

    frame = runs.runs
    chosen = frame[frame["run_id"] == run_id] if run_id else frame[frame["status"] == "FINISHED"]
    client = MlflowClient(tracking_uri=runs.uri)
    for row in chosen.sort_values(["dataset", "detector", "seed"]).head(tries).itertuples():
        with tempfile.TemporaryDirectory() as folder:
            try:
                scores = pd.read_parquet(client.download_artifacts(row.run_id, "scores.parquet", folder))
            except (MlflowException, OSError):
                continue
        return scores, f"{row.dataset} / {row.detector} / seed {row.seed} (run {row.run_id[:8]})"
    return None, None


def method_label(table: pd.DataFrame) -> pd.Series:
    """One label per method: the detector, its weight where a detector has
    several, and the settings that tell cells apart."""
    weights = table.groupby("detector")["weight"].nunique()
    label = table["detector"] + table.apply(
        lambda r: f" w={r['weight']:g}" if pd.notna(r["weight"]) and weights[r["detector"]] > 1 else "", axis=1)
    settings = table["settings"] if "settings" in table else pd.Series("", index=table.index)
    return label + settings.map(lambda s: f" [{s}]" if s else "")


def method_matrix(table: pd.DataFrame, metric: str) -> pd.DataFrame:
    """Datasets x methods of a metric's mean over seeds (one cell each)."""
    frame = table.assign(method=method_label(table))
    return frame.pivot(index="dataset", columns="method", values=f"{metric}.mean")


def write_figures(runs: RunTable, table: pd.DataFrame, out: Path, run_id: str | None = None,
                  rank_metric: str = "auroc") -> dict[str, Path]:
    os.environ.setdefault("MPLBACKEND", "Agg")
    written: dict[str, Path] = {}
    written.update(tradeoff_figure(table, out))
    written.update(flag_rate_figure(runs.runs, out))
    scores, title = first_finished_scores(runs, run_id)
    if scores is not None:
        written.update(score_ecdf_figure(scores, out, title))
    result = friedman_for(table, rank_metric)
    if result is not None and cd_diagram_reason(result) is None:
        written.update(critical_difference_figure(result, out, rank_metric))
    return written


def friedman_for(table: pd.DataFrame, metric: str):
    """Friedman test of the methods over datasets on a metric, or None when
    there are fewer than 2 complete datasets or 3 methods."""
    from evenflag.report.stats import friedman_nemenyi

    if f"{metric}.mean" not in table:
        return None
    matrix = method_matrix(table, metric)
    if matrix.shape[0] < 2 or matrix.shape[1] < 3:
        return None
    try:
        return friedman_nemenyi(better_score(metric, matrix), higher_is_better=True)
    except ValueError:
        return None



def trend_figure(periods: pd.DataFrame, group_names: list[str], out: Path, title: str = "") -> dict[str, Path]:
    """Flag rate of every group per period (with its interval) above the
    flag-rate ratio per period, with the four-fifths line: an audit over time."""
    from evenflag.metrics.keys import group_key

    plt = _plt()
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(7.0, 5.2), sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    x = np.arange(len(periods))
    for i, name in enumerate(group_names):
        key = f"flag_rate/{group_key(name)}"
        if key not in periods:
            continue
        rate = periods[key].to_numpy(dtype=float)
        low = periods.get(f"{key}.ci_low", pd.Series(np.nan, index=periods.index)).to_numpy(dtype=float)
        high = periods.get(f"{key}.ci_high", pd.Series(np.nan, index=periods.index)).to_numpy(dtype=float)
        errors = np.vstack([np.nan_to_num(rate - low), np.nan_to_num(high - rate)]).clip(min=0)
        top.errorbar(x + (i - (len(group_names) - 1) / 2) * 0.06, rate, yerr=errors, label=name, capsize=2,
                     linestyle=LINESTYLES[i % len(LINESTYLES)], marker=MARKERS[i % len(MARKERS)], markersize=4)
    top.set_ylabel("flag rate")
    top.legend(fontsize=7, frameon=False, ncols=min(len(group_names), 4))
    if title:
        top.set_title(title, fontsize=9)
    if "flag_rate_ratio" in periods:
        bottom.plot(x, periods["flag_rate_ratio"].to_numpy(dtype=float), marker="o", color="0.1")
    bottom.axhline(FOUR_FIFTHS, color="0.35", linestyle="--", linewidth=1)
    bottom.text(x[-1] if len(x) else 0, FOUR_FIFTHS, " four-fifths line", va="bottom", ha="right", fontsize=7,
                color="0.35")
    bottom.set_ylim(0, 1.05)
    bottom.set_ylabel("flag-rate ratio\n(lowest / highest)")
    bottom.set_xticks(x, [str(p) for p in periods["period"]], rotation=45 if len(x) > 6 else 0, ha="right" if len(x) > 6 else "center")
    bottom.set_xlabel("period")
    paths = _save(fig, out, "trend")
    plt.close(fig)
    return paths
