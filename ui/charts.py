"""Altair chart builders. They read the services' per-point tables and compute nothing new."""

from __future__ import annotations

import altair as alt
import pandas as pd

from shopdb import quantities

SIGNAL_COLOURS = alt.Scale(
    domain=["in control", "deterioration", "improvement", "pattern"],
    range=["#4c6a92", "#c2452d", "#3f8f5a", "#b8860b"],
)


DATE_AXIS = alt.Axis(format="%d %b %Y", labelAngle=0, labelOverlap="greedy")
EPISODE_COLOURS = alt.Scale(domain=["open", "handled"], range=["#f3c9bf", "#d9dde3"])


def control_chart(
    points: pd.DataFrame,
    *,
    title: str,
    y_title: str,
    episodes: pd.DataFrame | None = None,
) -> alt.TopLevelMixin:
    """The points joined in time order and coloured by signal, centre and 3-sigma limits as
    steps (limits change by phase), run-parameter changes (a new pad) marked and labelled, and
    each episode of signals shaded open or handled."""
    d = pd.DataFrame(  # only what the chart draws: the spec carries every column it is given
        {
            "when": pd.to_datetime(points["measured_at"], utc=True),
            "statistic": points["statistic"],
            "centre": points["centre"],
            "ucl": points["ucl"],
            "lcl": points["lcl"],
            "state": [
                (s or "pattern") if r else "in control"
                for r, s in zip(points["rules"], points["signal"], strict=True)
            ],
            "part": points["part"],
            "zone": points["zone"],
            "rules_text": [", ".join(r) for r in points["rules"]],
            "explanation": points["explanation"],
            "change": points.get("change", ""),
            "measurement_id": points["measurement_id"],
        }
    )
    x = alt.X("when:T", title="measured", axis=DATE_AXIS)
    base = alt.Chart(d).encode(x=x)
    layers: list = []
    if episodes is not None and not episodes.empty:
        e = episodes.assign(
            start=pd.to_datetime(episodes["first"], utc=True),
            stop=pd.to_datetime(episodes["last"], utc=True),
        )[["start", "stop", "status", "signals", "what"]]
        layers.append(
            alt.Chart(e)
            .mark_rect(opacity=0.35)
            .encode(
                x="start:T",
                x2="stop:T",
                color=alt.Color("status:N", scale=EPISODE_COLOURS, title="episode"),
                tooltip=[
                    alt.Tooltip("status:N", title="episode"),
                    alt.Tooltip("signals:Q", title="signals"),
                    alt.Tooltip("what:N", title="latest signal"),
                ],
            )
        )
    layers += [
        base.mark_line(interpolate="step-after", strokeDash=dash, color=colour).encode(
            y=alt.Y(f"{col}:Q", title=y_title)
        )
        for col, dash, colour in (
            ("centre", [1, 0], "#555"),
            ("ucl", [6, 3], "#999"),
            ("lcl", [6, 3], "#999"),
        )
    ]
    layers.append(
        base.mark_line(color="#8c96a3", strokeWidth=1).encode(y="statistic:Q", order="when:T")
    )
    changes = d[d["change"] != ""]
    if not changes.empty:
        marks = alt.Chart(changes).encode(x=x)
        layers.append(marks.mark_rule(color="#6a4c93", strokeDash=[2, 2]))
        layers.append(
            marks.mark_text(align="left", dx=3, dy=-4, baseline="top", color="#6a4c93").encode(
                text="change:N", y=alt.value(0)
            )
        )
    pick = alt.selection_point(name="point", fields=["measurement_id"], on="click")
    layers.append(
        base.mark_circle(size=55, opacity=1)
        .encode(
            y=alt.Y("statistic:Q", title=y_title),
            color=alt.Color("state:N", scale=SIGNAL_COLOURS, title="point"),
            tooltip=[
                alt.Tooltip("when:T", title="measured", format="%d %b %Y %H:%M"),
                alt.Tooltip("part:N", title="part"),
                alt.Tooltip("statistic:Q", title=y_title, format=".3f"),
                alt.Tooltip("zone:N", title="zone"),
                alt.Tooltip("rules_text:N", title="rules"),
                alt.Tooltip("explanation:N", title="why"),
                alt.Tooltip("change:N", title="run change"),
                alt.Tooltip("measurement_id:Q", title="measurement"),
            ],
        )
        .add_params(pick)
    )
    return alt.layer(*layers).resolve_scale(color="independent").properties(title=title, height=280)


def convergence(
    per_run: pd.DataFrame, *, tolerance: float | None, y_title: str
) -> alt.TopLevelMixin:
    d = per_run.copy()
    d["value"] = d["value"].abs()
    base = alt.Chart(d).encode(
        x=alt.X("iteration:Q", title="polishing run", axis=alt.Axis(tickMinStep=1))
    )
    layers = [
        base.mark_line(point=True, color="#4c6a92").encode(
            y=alt.Y("value:Q", title=y_title, scale=alt.Scale(type="log")),
            tooltip=[
                alt.Tooltip("iteration:Q", title="run"),
                alt.Tooltip("value:Q", title=y_title, format=".2f"),
                alt.Tooltip("machine:N", title="machine"),
            ],
        )
    ]
    if tolerance is not None:
        layers.append(
            alt.Chart(pd.DataFrame({"tolerance": [tolerance]}))
            .mark_rule(color="#c2452d", strokeDash=[4, 3])
            .encode(y="tolerance:Q")
        )
    return alt.layer(*layers).properties(height=240)


def zernike_bars(terms: pd.DataFrame, *, top: int = 12) -> alt.Chart:
    """The ``top`` largest terms beyond piston and tilt (which carry the set-up, not the part),
    as horizontal bars in ANSI order."""
    d = terms[terms["n"] > 1].copy()
    d = d.loc[d["coef_nm"].abs().nlargest(top).index].sort_values("ansi")
    d["label"] = [f"Z({n},{m}) {t}" for n, m, t in zip(d["n"], d["m"], d["term"], strict=True)]
    return (
        alt.Chart(d)
        .mark_bar()
        .encode(
            y=alt.Y("label:N", sort=None, title=None, axis=alt.Axis(labelLimit=220)),
            x=alt.X("coef_nm:Q", title="coefficient (nm RMS)"),
            color=alt.condition("datum.coef_nm > 0", alt.value("#4c6a92"), alt.value("#b06a3b")),
            tooltip=[
                alt.Tooltip("label:N", title="term"),
                alt.Tooltip("coef_nm:Q", title="coefficient (nm RMS)", format=".3f"),
                alt.Tooltip("ansi:Q", title="ANSI index"),
                alt.Tooltip("noll:Q", title="Noll index"),
            ],
        )
        .properties(height=20 * len(d) + 40)
    )


def psd_bands(bands: pd.DataFrame) -> alt.Chart:
    d = bands.copy()
    d["band"] = [
        quantities.period_range(lo, h)
        for lo, h in zip(d["low_per_mm"], d["high_per_mm"], strict=True)
    ]
    return (
        alt.Chart(d)
        .mark_bar(color="#6b8e6b")
        .encode(
            x=alt.X("band:N", sort=None, title="spatial period", axis=alt.Axis(labelAngle=0)),
            y=alt.Y("rms_nm:Q", title="band RMS (nm)"),
            tooltip=[
                alt.Tooltip("band:N", title="spatial period"),
                alt.Tooltip("rms_nm:Q", title="band RMS (nm)", format=".3f"),
            ],
        )
        .properties(height=220)
    )


def profile(x_mm, height_nm, *, title: str) -> alt.Chart:
    d = pd.DataFrame({"x": x_mm, "z": height_nm}).dropna()
    return (
        alt.Chart(d)
        .mark_line(color="#4c6a92")
        .encode(
            x=alt.X("x:Q", title="x (mm)"),
            y=alt.Y("z:Q", title="height (nm)"),
            tooltip=[
                alt.Tooltip("x:Q", title="x (mm)", format=".1f"),
                alt.Tooltip("z:Q", title="height (nm)", format=".2f"),
            ],
        )
        .properties(title=title, height=200)
    )


def drift(cals: pd.DataFrame, band: pd.DataFrame, *, y_title: str) -> alt.TopLevelMixin:
    area = (
        alt.Chart(band)
        .mark_area(opacity=0.25, color="#4c6a92")
        .encode(
            x=alt.X("when:T", title="calibrated", axis=DATE_AXIS),
            y=alt.Y("low:Q", title=y_title, scale=alt.Scale(zero=False)),
            y2="high:Q",
        )
    )
    line = alt.Chart(band).mark_line(color="#4c6a92").encode(x="when:T", y="fit:Q")
    pts = (
        alt.Chart(cals)
        .mark_point(filled=True, size=60, color="#222")
        .encode(
            x="calibrated_at:T",
            y="value:Q",
            tooltip=[
                alt.Tooltip("calibrated_at:T", title="calibrated", format="%d %b %Y"),
                alt.Tooltip("value:Q", title=y_title, format=".2f"),
                alt.Tooltip("uncertainty_nm:Q", title="u (nm)"),
            ],
        )
    )
    return alt.layer(area, line, pts).properties(height=260)


# three measures told apart by hue and lightness, not two blues (a palette of our own)
KPI_COLOURS = ["#2e7d4f", "#c2452d", "#6a4c93", "#b8860b"]


def kpi_lines(k: pd.DataFrame, columns: dict[str, str], *, x_title: str) -> alt.Chart:
    """One line per share (``{column: words}``) across the groups."""
    d = k.melt(id_vars="group", value_vars=list(columns), var_name="measure", value_name="share")
    d["measure"] = d["measure"].map(columns)
    return (
        alt.Chart(d)
        .mark_line(point=True, strokeWidth=2)
        .encode(
            x=alt.X("group:N", title=x_title, sort=None, axis=alt.Axis(labelAngle=0)),
            y=alt.Y("share:Q", axis=alt.Axis(format="%"), title="share of parts inspected"),
            color=alt.Color(
                "measure:N",
                title=None,
                sort=list(columns.values()),
                scale=alt.Scale(domain=list(columns.values()), range=KPI_COLOURS),
                legend=alt.Legend(orient="top"),
            ),
            tooltip=[
                alt.Tooltip("group:N", title=x_title),
                alt.Tooltip("measure:N", title="measure"),
                alt.Tooltip("share:Q", title="share", format=".0%"),
            ],
        )
        .properties(height=260)
    )


def pareto(p: pd.DataFrame) -> alt.TopLevelMixin:
    """Failed fields as horizontal bars, most first, each labelled with the cumulative share."""
    d = p.assign(share_text=[f"{c:.0%} cumulative" for c in p["cumulative_share"]])
    y = alt.Y("label:N", sort=None, title=None, axis=alt.Axis(labelLimit=260))
    bars = (
        alt.Chart(d)
        .mark_bar(color="#b06a3b")
        .encode(
            y=y,
            x=alt.X("count:Q", title="parts failing at first final inspection"),
            tooltip=[
                alt.Tooltip("label:N", title="failed field"),
                alt.Tooltip("count:Q", title="parts"),
                alt.Tooltip("cumulative_share:Q", title="cumulative share", format=".0%"),
            ],
        )
    )
    text = (
        alt.Chart(d)
        .mark_text(align="left", dx=4, color="#333")
        .encode(y=y, x="count:Q", text="share_text:N")
    )
    return alt.layer(bars, text).properties(height=alt.Step(30))


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
    y = alt.Y("field:N", title=None, sort=None, axis=alt.Axis(labelLimit=320))
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


FIELD_COLOURS = ["#4c6a92", "#b06a3b", "#6a4c93", "#3f8f5a", "#b8860b", "#8a2b1d"]


def lot_fields(parts: list[dict]) -> alt.TopLevelMixin:
    """Every part of a lot on one compact chart: each callout field's value ± U as a share of its
    limit (the limit at 100 %), one row per part, one colour per field."""
    rows = [
        {
            "part": p["serial"],
            "field": f"{f['label']} ({f['unit']})",
            "value": 100 * abs(f["measured"]) / f["limit"],
            "low": 100 * (abs(f["measured"]) - (f.get("U") or 0.0)) / f["limit"],
            "high": 100 * (abs(f["measured"]) + (f.get("U") or 0.0)) / f["limit"],
            "measured": abs(f["measured"]),
            "U": f.get("U"),
            "limit": f["limit"],
            "result": "passes" if f["passed"] else "does not pass",
        }
        for p in parts
        for f in p["fields"]
        if f.get("measured") is not None and f["limit"]
    ]
    d = pd.DataFrame(rows)
    if d.empty:
        return alt.Chart(pd.DataFrame({"x": []})).mark_point()
    fields = list(dict.fromkeys(d["field"]))
    colour = alt.Color(
        "field:N",
        title="field",
        sort=fields,
        scale=alt.Scale(domain=fields, range=FIELD_COLOURS[: len(fields)]),
        legend=alt.Legend(orient="top", labelLimit=320),
    )
    right = float(min(200.0, max(110.0, d["high"].max())))  # beyond twice the limit: at the edge
    y = alt.Y("part:N", title=None, sort=None)
    limit = alt.Chart(pd.DataFrame({"x": [100.0]})).mark_rule(color="#8a2b1d").encode(x="x:Q")
    interval = (
        alt.Chart(d)
        .mark_rule(strokeWidth=2)
        .encode(
            x=alt.X(
                "low:Q",
                title="share of the limit (%), value ± U; beyond 200 % drawn at the edge",
                scale=alt.Scale(domain=[0, right], clamp=True),
            ),
            x2="high:Q",
            y=y,
            color=colour,
        )
    )
    point = (
        alt.Chart(d)
        .mark_point(filled=True, size=50)
        .encode(
            x="value:Q",
            y=y,
            color=colour,
            shape=alt.Shape(
                "result:N",
                title="decision",
                scale=alt.Scale(domain=["passes", "does not pass"], range=["circle", "cross"]),
            ),
            tooltip=[
                alt.Tooltip("part:N", title="part"),
                alt.Tooltip("field:N", title="field"),
                alt.Tooltip("measured:Q", title="measured", format=".2f"),
                alt.Tooltip("U:Q", title="U (k = 2)", format=".2f"),
                alt.Tooltip("limit:Q", title="limit", format=".2f"),
                alt.Tooltip("result:N", title="decision"),
            ],
        )
    )
    return alt.layer(limit, interval, point).properties(height=alt.Step(24))


def preston(chart: dict, *, title: str) -> alt.TopLevelMixin:
    """A machine's Preston coefficient run by run (an I-MR individuals chart per pad): points
    coloured by pad, centre line and 3-sigma limits stepping where the pad changes."""
    d = pd.DataFrame(
        {
            "started": pd.to_datetime(chart["started_at"], utc=True),
            "part": chart["part"],
            "k_p": [v * 1e13 for v in chart["values"]],
            "pad": [p or "—" for p in chart["pads"]],
            "centre": [v * 1e13 for v in chart["centre"]],
            "ucl": [v * 1e13 for v in chart["ucl"]],
            "lcl": [max(v, 0) * 1e13 for v in chart["lcl"]],
        }
    )
    x = alt.X("started:T", title="run started", axis=DATE_AXIS)
    y_title = "Preston's coefficient (10⁻¹³ 1/Pa)"
    base = alt.Chart(d).encode(x=x)
    line = base.mark_line(color="#9aa5b1").encode(
        y=alt.Y("k_p:Q", title=y_title, scale=alt.Scale(zero=False))
    )
    points = base.mark_point(filled=True, size=45).encode(
        y="k_p:Q",
        color=alt.Color("pad:N", title="pad", scale=alt.Scale(range=KPI_COLOURS)),
        tooltip=[
            alt.Tooltip("started:T", title="run started", format="%Y-%m-%d %H:%M"),
            alt.Tooltip("part:N", title="part"),
            alt.Tooltip("pad:N", title="pad"),
            alt.Tooltip("k_p:Q", title=y_title, format=".3f"),
        ],
    )
    limits = [
        base.mark_line(interpolate="step-after", color=colour, strokeDash=dash).encode(
            y=f"{column}:Q", detail="pad:N"
        )
        for column, colour, dash in (
            ("centre", "#4c6a92", []),
            ("ucl", "#c2452d", [4, 3]),
            ("lcl", "#c2452d", [4, 3]),
        )
    ]
    return alt.layer(line, *limits, points).properties(height=240, title=title)


def planned_against_achieved(rows: list[dict], *, title: str) -> alt.TopLevelMixin:
    """Each planned run: the RMS its plan predicted and the RMS it achieved, joined by a rule,
    over the run's start."""
    d = pd.DataFrame(rows)
    d["started"] = pd.to_datetime(d["started_at"], utc=True)
    long = pd.concat(
        [
            d.assign(kind="planned", rms=d["predicted_rms_nm"]),
            d.assign(kind="achieved", rms=d["achieved_rms_nm"]),
        ]
    )
    x = alt.X("started:T", title="run started", axis=DATE_AXIS)
    y = alt.Y("rms:Q", title="RMS (nm)")
    tooltip = [
        alt.Tooltip("part:N", title="part"),
        alt.Tooltip("iteration:Q", title="run"),
        alt.Tooltip("kind:N", title=""),
        alt.Tooltip("rms:Q", title="RMS (nm)", format=".2f"),
    ]
    rules = (
        alt.Chart(d)
        .mark_rule(color="#9aa5b1")
        .encode(x=x, y=alt.Y("predicted_rms_nm:Q", title="RMS (nm)"), y2="achieved_rms_nm:Q")
    )
    points = (
        alt.Chart(long)
        .mark_point(filled=True, size=50)
        .encode(
            x=x,
            y=y,
            color=alt.Color(
                "kind:N",
                title="",
                scale=alt.Scale(domain=["planned", "achieved"], range=KPI_COLOURS[:2]),
            ),
            tooltip=tooltip,
        )
    )
    return alt.layer(rules, points).properties(height=220, title=title)
