"""Altair chart builders. They read the services' per-point tables and compute nothing new."""

from __future__ import annotations

import altair as alt
import pandas as pd

SIGNAL_COLOURS = alt.Scale(
    domain=["in control", "deterioration", "improvement", "pattern"],
    range=["#4c6a92", "#c2452d", "#3f8f5a", "#b8860b"],
)


def control_chart(points: pd.DataFrame, *, title: str, y_title: str) -> alt.TopLevelMixin:
    """Points coloured by signal, with centre and 3-sigma limits as steps (limits change by phase)."""
    d = points.copy()
    d["when"] = pd.to_datetime(d["measured_at"], utc=True)
    d["state"] = [
        (s or "pattern") if r else "in control"
        for r, s in zip(d["rules"], d["signal"], strict=True)
    ]
    d["rules_text"] = d["rules"].map(lambda r: ", ".join(r))
    base = alt.Chart(d).encode(x=alt.X("when:T", title=None))
    lines = [
        base.mark_line(interpolate="step-after", strokeDash=dash, color=colour).encode(
            y=alt.Y(f"{col}:Q")
        )
        for col, dash, colour in (
            ("centre", [1, 0], "#555"),
            ("ucl", [6, 3], "#999"),
            ("lcl", [6, 3], "#999"),
        )
    ]
    pick = alt.selection_point(name="point", fields=["measurement_id"], on="click")
    dots = (
        base.mark_circle(size=55)
        .encode(
            y=alt.Y("statistic:Q", title=y_title),
            color=alt.Color("state:N", scale=SIGNAL_COLOURS, title="point"),
            tooltip=[
                alt.Tooltip("when:T", title="measured"),
                "part:N",
                alt.Tooltip("statistic:Q", format=".3f"),
                "zone:N",
                alt.Tooltip("rules_text:N", title="rules"),
                alt.Tooltip("explanation:N", title="why"),
                "measurement_id:Q",
            ],
        )
        .add_params(pick)
    )
    return alt.layer(*lines, dots).properties(title=title, height=260)


def convergence(
    per_run: pd.DataFrame, *, tolerance: float | None, y_title: str
) -> alt.TopLevelMixin:
    d = per_run.copy()
    d["value"] = d["value"].abs()
    base = alt.Chart(d).encode(
        x=alt.X("iteration:Q", title="polishing run", axis=alt.Axis(tickMinStep=1))
    )
    layers = [
        base.mark_line(point=True).encode(
            y=alt.Y("value:Q", title=y_title, scale=alt.Scale(type="log")),
            tooltip=["iteration:Q", alt.Tooltip("value:Q", format=".2f"), "machine:N"],
        )
    ]
    if tolerance is not None:
        layers.append(
            alt.Chart(pd.DataFrame({"tolerance": [tolerance]}))
            .mark_rule(color="#c2452d", strokeDash=[4, 3])
            .encode(y="tolerance:Q")
        )
    return alt.layer(*layers).properties(height=240)


def zernike_bars(terms: pd.DataFrame) -> alt.Chart:
    d = terms[terms["n"] > 1].copy()  # piston and tilt carry the set-up, not the part
    d["label"] = [f"Z({n},{m}) {t}" for n, m, t in zip(d["n"], d["m"], d["term"], strict=True)]
    return (
        alt.Chart(d)
        .mark_bar()
        .encode(
            x=alt.X(
                "label:N", sort=None, title=None, axis=alt.Axis(labelAngle=-60, labelLimit=140)
            ),
            y=alt.Y("coef_nm:Q", title="coefficient (nm RMS)"),
            color=alt.condition("datum.coef_nm > 0", alt.value("#4c6a92"), alt.value("#b06a3b")),
            tooltip=["label:N", alt.Tooltip("coef_nm:Q", format=".3f"), "ansi:Q", "noll:Q"],
        )
        .properties(height=240)
    )


def psd_bands(bands: pd.DataFrame) -> alt.Chart:
    d = bands.copy()
    d["band"] = [
        f"{_period(h)}–{_period(lo)} mm"
        for lo, h in zip(d["low_per_mm"], d["high_per_mm"], strict=True)
    ]
    return (
        alt.Chart(d)
        .mark_bar(color="#6b8e6b")
        .encode(
            x=alt.X("band:N", sort=None, title="spatial period"),
            y=alt.Y("rms_nm:Q", title="band RMS (nm)"),
            tooltip=["band:N", alt.Tooltip("rms_nm:Q", format=".3f")],
        )
        .properties(height=220)
    )


def _period(f) -> str:
    if f is None or (isinstance(f, float) and f != f):
        return "0"
    return "∞" if f == 0 else f"{1 / f:.3g}"


def drift(cals: pd.DataFrame, band: pd.DataFrame, *, y_title: str) -> alt.TopLevelMixin:
    area = (
        alt.Chart(band)
        .mark_area(opacity=0.25, color="#4c6a92")
        .encode(x=alt.X("when:T", title=None), y=alt.Y("low:Q", title=y_title), y2="high:Q")
    )
    line = alt.Chart(band).mark_line(color="#4c6a92").encode(x="when:T", y="fit:Q")
    pts = (
        alt.Chart(cals)
        .mark_point(filled=True, size=60, color="#222")
        .encode(
            x="calibrated_at:T",
            y="value:Q",
            tooltip=[
                alt.Tooltip("calibrated_at:T", title="calibrated"),
                alt.Tooltip("value:Q", format=".2f"),
                alt.Tooltip("uncertainty_nm:Q", title="u (nm)"),
            ],
        )
    )
    return alt.layer(area, line, pts).properties(height=260)


def kpi_lines(k: pd.DataFrame, columns: list[str]) -> alt.Chart:
    d = k.melt(id_vars="group", value_vars=columns, var_name="measure", value_name="share")
    d["measure"] = d["measure"].str.replace("_", " ")  # "first pass yield", not a column name
    return (
        alt.Chart(d)
        .mark_line(point=True)
        .encode(
            x=alt.X("group:N", title=None, sort=None),
            y=alt.Y("share:Q", axis=alt.Axis(format="%"), title=None),
            color=alt.Color("measure:N", title=None),
            tooltip=["group:N", "measure:N", alt.Tooltip("share:Q", format=".0%")],
        )
        .properties(height=260)
    )


def pareto(p: pd.DataFrame) -> alt.TopLevelMixin:
    bars = (
        alt.Chart(p)
        .mark_bar(color="#b06a3b")
        .encode(
            x=alt.X("reason:N", sort=None, title="failed field"), y=alt.Y("count:Q", title="parts")
        )
    )
    cum = (
        alt.Chart(p)
        .mark_line(point=True, color="#333")
        .encode(
            x=alt.X("reason:N", sort=None),
            y=alt.Y("cumulative_share:Q", axis=alt.Axis(format="%"), title="cumulative"),
        )
    )
    return alt.layer(bars, cum).resolve_scale(y="independent").properties(height=240)


def verdict_fields(fields: list[dict]) -> alt.TopLevelMixin:
    """Each judged field on one axis, as a share of its limit: the limit (100 %), the decision
    rule's guard band between the limit and its acceptance limit, and the measured value with
    its interval +- U (the zones of ISO 14253-1 read off directly)."""
    rows = []
    for f in fields:
        if f.get("measured") is None:
            continue
        lim = f["limit"]
        u = f.get("U") or 0.0
        acc = f.get("acceptance_limit") or lim
        rows.append(
            {
                "field": f"{f['label']} ({f['unit']})",
                "value": 100 * abs(f["measured"]) / lim,
                "low": 100 * (abs(f["measured"]) - u) / lim,
                "high": 100 * (abs(f["measured"]) + u) / lim,
                "band_from": 100 * min(acc, lim) / lim,
                "band_to": 100 * max(acc, lim) / lim,
                "measured": abs(f["measured"]),
                "U": u,
                "limit": lim,
                "zone": f.get("zone") or "no uncertainty stated",
                "result": "passes" if f["passed"] else "does not pass",
            }
        )
    d = pd.DataFrame(rows)
    if d.empty:
        return alt.Chart(pd.DataFrame({"x": []})).mark_point()
    y = alt.Y("field:N", title=None, sort=None)
    band = (
        alt.Chart(d)
        .mark_bar(color="#e8d28a", opacity=0.7, height=18)
        .encode(x=alt.X("band_from:Q", title="share of the limit (%)"), x2="band_to:Q", y=y)
    )
    limit = alt.Chart(pd.DataFrame({"x": [100.0]})).mark_rule(color="#8a2b1d").encode(x="x:Q")
    interval = (
        alt.Chart(d).mark_rule(strokeWidth=3, color="#2f4b6e").encode(x="low:Q", x2="high:Q", y=y)
    )
    point = (
        alt.Chart(d)
        .mark_point(filled=True, size=90, shape="diamond")
        .encode(
            x="value:Q",
            y=y,
            color=alt.Color(
                "result:N",
                scale=alt.Scale(domain=["passes", "does not pass"], range=["#2e7d4f", "#b3261e"]),
                title="decision",
            ),
            tooltip=[
                "field:N",
                alt.Tooltip("measured:Q", format=".2f"),
                alt.Tooltip("U:Q", title="U (k = 2)", format=".2f"),
                alt.Tooltip("limit:Q", format=".2f"),
                "zone:N",
                "result:N",
            ],
        )
    )
    return alt.layer(band, limit, interval, point).properties(height=40 * len(d) + 40)
