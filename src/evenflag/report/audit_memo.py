"""The memo of one audit: what the file was, who was flagged per group, the
tests, the change over periods, what was left out and why, and the caution."""

from __future__ import annotations

import numpy as np
import pandas as pd

from evenflag.metrics.facts import FOUR_FIFTHS
from evenflag.metrics.keys import group_key

AUDIT_CAUTION = (
    "**Caution.** These numbers describe one detector's flags on the rows of this file; they change with the "
    "population, the period, the threshold and how outcomes were reviewed. The four-fifths rule is a rule of "
    "thumb, not a legal finding. Defer to local law, regulators and qualified counsel before acting on them."
)


def _num(value, digits: int = 3) -> str:
    return "n/a" if value is None or not np.isfinite(value) else f"{value:.{digits}f}"


def _interval(values: dict, key: str, digits: int = 3) -> str:
    low, high = values.get(f"{key}.ci_low"), values.get(f"{key}.ci_high")
    if low is None or high is None or not (np.isfinite(low) and np.isfinite(high)):
        return ""
    return f" [{low:.{digits}f}, {high:.{digits}f}]"


def group_table(values: dict, sizes: dict[str, int], flagged: dict[str, int], reference: str, level: float) -> list[str]:
    """Who was flagged, per group: rows, flags, flag rate and its ratio to the reference."""
    has_precision = any(k.startswith("precision/") for k in values)
    has_weight = any(k.startswith("weighted_flag_rate/") for k in values)
    header = ["group", "rows", "flagged", f"flag rate [{level:.0%} CI]", "ratio to reference [CI]"]
    header += ["hit rate among flagged [CI]"] if has_precision else []
    header += ["weighted flag rate"] if has_weight else []
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    for name, rows in sizes.items():
        key = group_key(name)
        ratio = ("1 (reference)" if name == reference else
                 _num(values.get(f"flag_rate_vs_reference/{key}")) + _interval(values, f"flag_rate_vs_reference/{key}"))
        cells = [name, f"{rows:,}", f"{flagged.get(name, 0):,}",
                 _num(values.get(f"flag_rate/{key}"), 4) + _interval(values, f"flag_rate/{key}", 4), ratio]
        if has_precision:
            cells.append(_num(values.get(f"precision/{key}")) + _interval(values, f"precision/{key}"))
        if has_weight:
            cells.append(_num(values.get(f"weighted_flag_rate/{key}"), 4))
        lines.append("| " + " | ".join(cells) + " |")
    return lines


def period_table(periods: pd.DataFrame, group_names: list[str]) -> list[str]:
    header = ["period", "rows", "flagged", *[f"flag rate {g}" for g in group_names], "flag-rate ratio"]
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    for _, row in periods.iterrows():
        rates = [_num(row.get(f"flag_rate/{group_key(g)}"), 4) for g in group_names]
        lines.append("| " + " | ".join([str(row["period"]), f"{int(row['rows']):,}", f"{int(row['flagged']):,}",
                                         *rates, _num(row.get("flag_rate_ratio"))]) + " |")
    return lines


def audit_memo(meta: dict, values: dict, notes: dict, periods: pd.DataFrame, skipped: list[str],
               figure: str | None, level: float = 0.95) -> str:
    """Markdown of an audit. ``meta`` holds file, path, rows, sha256, run_id,
    study, settings lines, group sizes and flags per group."""
    ratio = values.get("flag_rate_ratio")
    passes = values.get("four_fifths_pass")
    lines = [f"# Audit of `{meta['file']}`", "",
             "## The file", "",
             f"- file: `{meta['path']}` ({meta['format']})",
             f"- rows: {meta['rows']:,}",
             f"- sha256: `{meta['sha256']}`",
             f"- tracking: run `{meta['run_id']}` in study `{meta['study']}` (`{meta['uri']}`)",
             f"- code version: {meta['code']}"]
    if meta.get("periods"):
        lines.append(f"- periods: {len(meta['periods'])}, from {meta['periods'][0]} to {meta['periods'][-1]}")
    lines += [f"- {line}" for line in meta["settings"]]
    lines += ["", "## Who was flagged", ""]
    lines += group_table(values, meta["sizes"], meta["flagged"], notes.get("reference_group", ""), level)
    lines += ["", f"Flag-rate ratio (lowest over highest group flag rate): **{_num(ratio)}**; "
              + ("it is at or above the four-fifths line (0.8)." if passes == 1.0 else
                 f"it is below the four-fifths line ({FOUR_FIFTHS})." if passes == 0.0 else "")]
    lines += ["", "## Tests", ""]
    if np.isfinite(values.get("worst_pair_z_p", np.nan)):
        lines.append(f"- Highest against lowest flag rate: two-proportion z p = {_num(values['worst_pair_z_p'], 4)}, "
                     f"Fisher's exact p = {_num(values.get('worst_pair_fisher_p'), 4)}.")
    for key in sorted(k for k in values if k.startswith("flag_rate_diff/") and "." not in k):
        group = key.split("/", 1)[1]
        low, high = values.get(f"{key}.ci_low", np.nan), values.get(f"{key}.ci_high", np.nan)
        verdict = ("the interval excludes 0" if np.isfinite(low) and (low > 0 or high < 0)
                   else "the interval includes 0 (no difference shown)")
        lines.append(f"- Flag rate of {group} minus the reference ({notes.get('reference_group')}): "
                     f"{_num(values[key], 4)}{_interval(values, key, 4)}; {verdict}.")
    change = sorted(k for k in values if k.startswith("ratio_change/") and "." not in k)
    if meta.get("periods"):
        lines += ["", "## Over time", ""]
        lines += period_table(periods, list(meta["sizes"]))
        if figure:
            lines += ["", f"![flag rates and flag-rate ratio per period]({figure})"]
        lines.append("")
        if change:
            for key in change:
                group = key.split("/", 1)[1]
                p = values.get(f"ratio_change_p/{group}")
                holm = values.get(f"ratio_change_p_holm/{group}")
                lines.append(
                    f"- {group}: flag-rate ratio to the reference in {meta['periods'][-1]} over that in "
                    f"{meta['periods'][0]} = {_num(values[key])}{_interval(values, key)}; Wald p = {_num(p, 4)}"
                    + (f", Holm-adjusted p = {_num(holm, 4)}" if len(change) > 1 else "")
                    + (" (a change is shown at the 5% level)." if (holm if len(change) > 1 else p) < 0.05
                       else " (no change shown at the 5% level)."))
        else:
            lines.append("- No change test: it needs at least two periods with flags in every group compared.")
    if skipped:
        lines += ["", "## Left out", ""] + [f"- {line}" for line in skipped]
    lines += ["", "## Caution", "", AUDIT_CAUTION, ""]
    return "\n".join(lines)
