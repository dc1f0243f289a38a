"""Manager KPIs from a per-part outcome table.

Input columns (one row per part that reached a final inspection): ``part``, ``group`` (month,
drawing, machine, ...), ``first_pass`` (passed its first final inspection), ``reworks`` (rework
cycles), ``scrapped``, ``iterations`` (polishing runs to spec, NaN if never), ``cycle_days``,
``failed_fields`` (list of callout fields that failed, e.g. ["irregularity"]), ``conditional``
(some field of that inspection lay inside its uncertainty range, ISO 14253-1).

Definitions (common practice): first-pass yield = parts passing at their first final inspection
/ parts inspected; rework rate = parts with at least one rework / inspected; scrap rate =
scrapped / inspected; conditional rate = parts whose first final inspection had a field inside its
uncertainty range / inspected (counted apart: neither conformance nor non-conformance proven).
"""

from __future__ import annotations

from collections import Counter

import pandas as pd

COLUMNS = (
    "part",
    "group",
    "first_pass",
    "reworks",
    "scrapped",
    "iterations",
    "cycle_days",
    "failed_fields",
    "conditional",
)


def kpis(outcomes: pd.DataFrame) -> pd.DataFrame:
    """KPIs per group from a per-part outcome table.

    Notes
    -----
    First-pass yield, rework and scrap rates as defined in the module notes (common practice).
    """
    missing = set(COLUMNS) - set(outcomes.columns)
    if missing:
        raise ValueError(f"outcome table lacks columns: {', '.join(sorted(missing))}")
    if outcomes.empty:
        return pd.DataFrame(
            columns=[
                "group",
                "inspected",
                "first_pass_yield",
                "rework_rate",
                "rework_cycles_per_part",
                "scrap_rate",
                "conditional_rate",
                "mean_iterations",
                "mean_cycle_days",
            ]
        )
    g = outcomes.groupby("group", sort=True)
    out = pd.DataFrame(
        {
            "inspected": g.size(),
            "first_pass_yield": g["first_pass"].mean(),
            "rework_rate": g["reworks"].apply(lambda s: float((s > 0).mean())),
            "rework_cycles_per_part": g["reworks"].mean(),
            "scrap_rate": g["scrapped"].mean(),
            "conditional_rate": g["conditional"].mean(),
            "mean_iterations": g["iterations"].mean(),
            "mean_cycle_days": g["cycle_days"].mean(),
        }
    ).reset_index()
    return out


def pareto(outcomes: pd.DataFrame) -> pd.DataFrame:
    """Failure reasons (callout fields) by count, with the cumulative share.

    Notes
    -----
    A Pareto chart's counts and cumulative share (Juran; common practice in quality
    management).
    """
    counts = Counter(f for fields in outcomes["failed_fields"] for f in (fields or []))
    rows = sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))
    df = pd.DataFrame(rows, columns=["reason", "count"])
    total = df["count"].sum()
    df["cumulative_share"] = df["count"].cumsum() / total if total else 0.0
    return df
