"""Tables and charts as people read them: headers in words with units (quantities from the catalogue),
times in the shop's time zone to the minute, a dash for what is missing; every chart offered
as PNG and SVG (tables carry their own CSV download)."""

from __future__ import annotations

import math
from collections.abc import Mapping

import pandas as pd
import streamlit as st

from shopdb import quantities
from shopdb.config import local_time

# counts and run numbers: shown without decimals even where a missing value made them floats
WHOLE = {"iteration", "points", "signals", "days_left", "inspected", "parts", "count"}

# column names the read models use that are not quantities
WORDS = {
    "measurement_id": "measurement",
    "result_id": "result",
    "part": "part",
    "serial": "part",
    "drawing": "drawing",
    "machine": "machine",
    "station": "station",
    "iteration": "run",
    "measured_at": "measured",
    "calibrated_at": "calibrated",
    "valid_until": "valid until",
    "last_calibration": "last calibration",
    "last_measured": "last measured",
    "days_left": "days left",
    "runs_to_spec": "runs to spec",
    "interval": "5–95 % range",
    "tolerance": "tolerance (nm)",
    "latest": "latest (nm)",
    "lot_status": "lot status",
    "verdict_if_corrected": "verdict if corrected",
    "uncertainty_nm": "calibration u (nm)",
    "value": "value",
    "first": "first signal",
    "last": "last signal",
    "recorded_by": "recorded by",
    "recorded_at": "recorded",
    "group": "chart",
    "inspected": "parts inspected",
    "first_pass_yield": "first-pass yield",
    "rework_rate": "rework rate",
    "rework_cycles_per_part": "rework cycles per part",
    "scrap_rate": "scrap rate",
    "conditional_rate": "within U at first inspection",
    "mean_iterations": "runs to spec (mean)",
    "mean_cycle_days": "cycle time (days, mean)",
    "cumulative_share": "cumulative share",
}


def header(column: str) -> str:
    """The words for a column: a quantity's title with its unit, else :data:`WORDS`."""
    if column in quantities.BY_NAME:
        return quantities.BY_NAME[column].title
    return WORDS.get(column, column.replace("_", " "))


def words(v) -> str:
    """A setting's value as text: "—" for none, yes/no, lists joined by commas."""
    if v is None:
        return "—"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, list | tuple):
        return ", ".join(words(x) for x in v) or "—"
    if isinstance(v, dict):
        return "; ".join(f"{k.replace('_', ' ')} {words(x)}" for k, x in v.items()) or "—"
    return str(v)


def _cell(v, tz: str):
    if v is None or v is pd.NaT:
        return "—"
    if isinstance(v, float) and not math.isfinite(v):
        return "—"
    if isinstance(v, pd.Timestamp) or (hasattr(v, "tzinfo") and hasattr(v, "isoformat")):
        return local_time(v, tz)
    return v


def table(
    df: pd.DataFrame,
    columns: Mapping[str, str | None] | list[str],
    *,
    tz: str = "UTC",
    digits: int | None = 2,
) -> pd.DataFrame:
    """The chosen columns of ``df`` for display: each renamed (``{column: header}``, a None
    header meaning :func:`header`), times to the minute in ``tz``, numbers rounded, "—" for
    missing values."""
    if isinstance(columns, list):
        columns = {c: None for c in columns}
    out = pd.DataFrame(index=df.index)
    for col, name in columns.items():
        s = df[col]
        if pd.api.types.is_datetime64_any_dtype(s) or (
            s.dtype == object and s.map(lambda v: hasattr(v, "tzinfo")).any()
        ):
            s = s.map(lambda v: _cell(v, tz))
        elif col in WHOLE and pd.api.types.is_float_dtype(s):
            s = s.map(lambda v: "—" if v != v or v is None else str(int(v)))
        elif pd.api.types.is_float_dtype(s):
            if digits is not None:
                s = s.round(digits)
            if s.isna().any():  # one type per column: numbers as text beside the dashes
                s = s.map(
                    lambda v, f=f"{{:.{digits}f}}" if digits is not None else "{:.6g}": (
                        "—" if v != v else f.format(v)
                    )
                )
        else:
            s = s.map(lambda v: _cell(v, tz))
            if s.map(type).nunique() > 1:  # mixed (numbers and dashes): all as text
                s = s.map(str)
        out[name or header(col)] = s
    return out.reset_index(drop=True)


def chart(c, *, name: str, key: str, on_select: bool = False):
    """Draw an Altair chart across the page with a Download menu (PNG, SVG), made on demand
    (vl-convert renders the chart's own Vega-Lite spec; Streamlit's chart menu offers no export).
    Returns the chart's selection event."""
    event = (
        st.altair_chart(c, width="stretch", key=key, on_select="rerun")
        if on_select
        else st.altair_chart(c, width="stretch", key=key)
    )
    with st.popover("Download chart", icon=":material/download:", type="tertiary"):

        def png() -> bytes:
            import vl_convert

            return vl_convert.vegalite_to_png(c.to_json(), scale=2)

        def svg() -> str:
            import vl_convert

            return vl_convert.vegalite_to_svg(c.to_json())

        st.download_button(
            "PNG", png, f"{name}.png", "image/png", key=f"{key}-png", on_click="ignore"
        )
        st.download_button(
            "SVG", svg, f"{name}.svg", "image/svg+xml", key=f"{key}-svg", on_click="ignore"
        )
    return event


_MARKDOWN = str.maketrans({c: "\\" + c for c in "\\`*_{}[]()<>#+-.!|~$:"})


def esc(value) -> str:
    """Text typed by a user (a drawing title, a name, a reason), made safe to put in Markdown:
    every character Markdown acts on is escaped, so it shows as typed, never as a link, an image
    or formatting."""
    return str(value).translate(_MARKDOWN)
