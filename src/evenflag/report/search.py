"""Reports of a trade-off search: which configurations are Pareto-optimal in
the search's objectives, and the front drawn over every trial.

A run made by the search sweeper carries the tags ``search_trial`` and
``search_objectives`` ('auroc:maximize flag_rate_ratio:maximize'). One
configuration is one table cell (mean over its seeds, usually one).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from evenflag.report.collect import RunTable


def pareto_mask(values: np.ndarray, maximise: list[bool]) -> np.ndarray:
    """True for rows no other row dominates (at least as good in every
    objective and better in one). Rows with a NaN objective are never optimal.

    Examples
    --------
    >>> pareto_mask(np.array([[0.9, 0.5], [0.8, 0.7], [0.7, 0.6], [0.9, 0.5]]), [True, True]).tolist()
    [True, True, False, True]
    """
    signed = np.where(maximise, 1.0, -1.0) * np.asarray(values, dtype=float)
    finite = np.isfinite(signed).all(axis=1)
    keep = np.zeros(len(signed), dtype=bool)
    for i in np.flatnonzero(finite):
        others = signed[finite]
        dominated = ((others >= signed[i]).all(axis=1) & (others > signed[i]).any(axis=1)).any()
        keep[i] = not dominated
    return keep


def objectives_of(runs: RunTable) -> list[tuple[str, bool]]:
    """(metric, maximise) of the search the runs came from; [] if none."""
    tags = runs.runs.get("search_objectives", pd.Series(dtype=object)).dropna()
    tags = [t for t in tags if t]
    if not tags:
        return []
    return [(part.split(":")[0], part.split(":")[1] == "maximize") for part in tags[0].split()]


def pareto_cells(runs: RunTable, table: pd.DataFrame) -> pd.DataFrame:
    """The table's cells of searched runs with a ``pareto`` column, per dataset
    and detector; empty when the runs are not from a search."""
    objectives = objectives_of(runs)
    searched = runs.runs[runs.runs.get("search_trial", pd.Series("", index=runs.runs.index)).fillna("") != ""]
    if not objectives or searched.empty:
        return pd.DataFrame()
    keys = ["dataset", "detector", "weight", "settings"]
    wanted = searched[keys].astype(str).drop_duplicates()
    cells = _select(table, wanted, keys)
    columns = [f"{metric}.mean" for metric, _ in objectives]
    if any(c not in cells for c in columns):
        return pd.DataFrame()
    cells = cells.copy()
    cells["pareto"] = False
    for _, index in cells.groupby(["dataset", "detector"]).groups.items():
        part = cells.loc[index]
        cells.loc[index, "pareto"] = pareto_mask(part[columns].to_numpy(), [m for _, m in objectives])
    return cells


def _select(table: pd.DataFrame, wanted: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    marks = set(map(tuple, wanted.to_numpy()))
    return table[[tuple(str(v) for v in row) in marks for row in table[keys].itertuples(index=False)]]


def searched_settings(runs: RunTable, cells: pd.DataFrame) -> pd.DataFrame:
    """The searched parameters' values of each cell (from its first run's params)."""
    frame = runs.runs
    names = [n for n in next((t for t in frame.get("search_params", pd.Series(dtype=object)).dropna() if t), "").split()]
    keys = ["dataset", "detector", "weight", "settings"]
    first = {tuple(str(v) for v in row[keys]): row["config"] for _, row in frame.iterrows()}
    values = [{name: first.get(tuple(str(v) for v in row[keys]), {}).get(name, "") for name in names}
              for _, row in cells.iterrows()]
    return pd.DataFrame(values, index=cells.index, columns=names)


def write_search(runs: RunTable, out: Path, figures: bool = True) -> dict[str, Path]:
    """``pareto.md`` / ``pareto.csv`` (the Pareto-optimal configurations) and
    ``search_front.png`` (every trial, the front, the four-fifths line)."""
    objectives = objectives_of(runs)
    if not objectives:
        return {}
    from evenflag.report.tables import aggregate

    # The objectives' own means, whichever metrics the displayed table shows.
    table = aggregate(runs.runs, [metric for metric, _ in objectives])
    cells = pareto_cells(runs, table)
    if cells.empty:
        return {}
    columns = [f"{metric}.mean" for metric, _ in objectives]
    cells = pd.concat([cells, searched_settings(runs, cells)], axis=1)
    params = list(searched_settings(runs, cells.iloc[:0]).columns)
    front = cells[cells["pareto"]].sort_values(["dataset", "detector", columns[0]], ascending=[True, True, False])
    written = {"pareto.csv": out / "pareto.csv", "pareto.md": out / "pareto.md"}
    front[["dataset", "detector", *params, *columns]].to_csv(written["pareto.csv"], index=False)
    written["pareto.md"].write_text("\n".join(pareto_lines(front, len(cells), params, objectives)) + "\n")
    if figures and len(objectives) >= 2:
        written.update(front_figure(cells, objectives, out))
    return written


def pareto_lines(front: pd.DataFrame, searched: int, params: list[str], objectives: list[tuple[str, bool]]) -> list[str]:
    names = [f"{m} ({'higher' if up else 'lower'} is better)" for m, up in objectives]
    lines = [f"Pareto-optimal configurations of the search in {', '.join(names)} "
             f"({len(front)} of {searched} searched configurations; no other configuration is at least as good "
             "in every objective and better in one):", "",
             "| dataset | detector | " + " | ".join(params + [m for m, _ in objectives]) + " |",
             "|---|---|" + "---:|" * (len(params) + len(objectives))]
    for _, row in front.iterrows():
        shown = [_short(row[p]) for p in params] + [f"{row[f'{m}.mean']:.3f}" for m, _ in objectives]
        lines.append(f"| {row['dataset']} | {row['detector']} | " + " | ".join(shown) + " |")
    return lines


def _short(value) -> str:
    try:
        return f"{float(value):.4g}"
    except (TypeError, ValueError):
        return str(value)


def front_figure(cells: pd.DataFrame, objectives: list[tuple[str, bool]], out: Path) -> dict[str, Path]:
    from evenflag.metrics.facts import FOUR_FIFTHS
    from evenflag.report.figures import _plt, _save

    plt = _plt()
    (x_key, _), (y_key, _) = objectives[:2]
    groups = list(cells.groupby(["dataset", "detector"]))
    fig, axes = plt.subplots(1, len(groups), figsize=(3.6 * len(groups), 3.2), squeeze=False)
    for ax, ((dataset, detector), part) in zip(axes[0], groups):
        x, y = part[f"{x_key}.mean"].to_numpy(float), part[f"{y_key}.mean"].to_numpy(float)
        on = part["pareto"].to_numpy(bool)
        ax.scatter(x[~on], y[~on], s=14, color="0.65", label="trial")
        order = np.argsort(x[on])
        ax.plot(x[on][order], y[on][order], "-D", color="0.1", markersize=5, linewidth=1.3, label="Pareto front")
        if y_key == "flag_rate_ratio":
            ax.axhline(FOUR_FIFTHS, linestyle="--", color="0.35", linewidth=0.9, label="four-fifths line")
        ax.set_xlabel(x_key.replace("_", " "))
        ax.set_ylabel(y_key.replace("_", " "))
        ax.set_title(f"{dataset}\n{detector}", fontsize=8)
    axes[0][0].legend(fontsize=7, frameon=False, loc="lower left")
    fig.tight_layout()
    paths = _save(fig, out, "search_front")
    plt.close(fig)
    return paths
