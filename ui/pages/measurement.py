"""One measurement: find it by part, drawing and date; its map in 2-D and 3-D, the verdict of each
field with its uncertainty, coefficients, PSD bands and provenance; downloads."""

from __future__ import annotations

from datetime import UTC, datetime, time, timedelta

import numpy as np
import pandas as pd
import streamlit as st

from shopdb.config import local_time
from shopdb.errors import ShopdbError
from shopdb.ui import charts, maps, state, view


def _finder() -> int | None:
    """Search by part serial, drawing and dates; the recent ones when nothing is typed."""
    ch = state.choices()
    c1, c2, c3 = st.columns([2, 2, 2])
    text = c1.text_input("Part serial contains", key="find-text", placeholder="e.g. 100-06")
    drawing = c2.selectbox("Drawing", ["any", *ch["drawings"]], key="find-drawing")
    days = c3.date_input("Measured between", value=[], key="find-days")
    start = end = None
    if isinstance(days, tuple) and len(days) == 2:
        start = datetime.combine(days[0], time(), tzinfo=UTC)
        end = datetime.combine(days[1], time(), tzinfo=UTC) + timedelta(days=1)
    found = state.find_measurements(text, None if drawing == "any" else drawing, start, end)
    if found.empty:
        st.info("No measurement matches.")
        return None
    shown = view.table(
        found,
        {
            "part": None,
            "drawing": None,
            "measured_at": None,
            "station": None,
            "judged": "judged at ingest",
            "failed": "failed fields",
        },
        tz=state.tz(),
    )
    st.caption("Newest first; pick a row to open it.")
    picked = st.dataframe(
        shown, hide_index=True, on_select="rerun", selection_mode="single-row", key="find-pick"
    )
    if picked and picked.selection.rows:
        return int(found.iloc[picked.selection.rows[0]]["measurement_id"])
    return None


def render() -> None:
    state.require_page("measurement")
    st.header("Measurement")
    with st.expander("Find a measurement", expanded="measurement_id" not in st.session_state):
        chosen = _finder()
    if chosen is not None:
        st.session_state["measurement_id"] = chosen
    mid = st.session_state.get("measurement_id")
    if mid is None:
        return
    try:
        d = state.measurement(int(mid))
    except ShopdbError as exc:
        st.warning(view.esc(exc))
        return
    tz = state.tz()
    st.subheader(f"Part {view.esc(d['part'])} · {local_time(d['measured_at'], tz)}")
    if st.button(f"Part history of {view.esc(d['part'])}", key="to-part"):
        state.open_part(d["part"])
    st.caption(
        f"{view.esc(d['drawing'])} · callout {view.esc(d['callout'])} · "
        + (
            f"run {d['iteration']} on {view.esc(d['machine'])} · "
            if d["iteration"]
            else "no polishing run · "
        )
        + view.esc(d["station"])
    )
    z = d["map_nm"]
    left, right = st.columns(2)
    with left:
        st.plotly_chart(
            maps.map_2d(z, d["dx_mm"], title="height (nm), seen from above"), key="map2d"
        )
    with right:
        st.plotly_chart(
            maps.surface_3d(z, d["dx_mm"], title="3-D view (drag to turn)"), key="map3d"
        )
    st.caption(
        f"{z.shape[1]} × {z.shape[0]} pixels of {d['dx_mm']:.3f} mm; +x to the right, +y up; "
        "as stored (reference-subtracted where the station does so)."
    )
    st.download_button(
        "Map (ISO 25178-72 X3P)",
        state.x3p(int(d["id"])),
        f"{d['part']}_m{d['id']}.x3p",
        "application/octet-stream",
        key="dl-x3p",
    )
    r = d["result"]
    c1, c2, c3 = st.columns(3)
    c1.metric("PV", f"{r['pv_nm']:.1f} nm")
    c2.metric("RMS", f"{r['rms_nm']:.2f} nm")
    c3.metric("PVr", f"{r['pvr_nm']:.1f} nm")
    v = d["verdict"]
    if v.fields:
        say = {"pass": st.success, "fail": st.error, "blocked": st.warning}[v.verdict]
        say(
            f"Against {view.esc(d['callout'])}: **{v.verdict}**"
            + (f" — {view.esc('; '.join(v.reasons))}" if v.reasons else " — meets every field")
        )
        view.chart(
            charts.verdict_fields([f.as_dict() for f in v.fields]),
            name=f"m{d['id']}-fields",
            key="fields",
        )
        st.caption(
            f"Decision rule **{v.fields[0].rule}**. Each bar is the measured value ± U "
            "(expanded uncertainty, k = 2) as a share of its limit; the yellow band lies between "
            "the limit and what the rule accepts. The verdict supports, and does not replace, the "
            "customer's drawing, the agreed decision rule and the shop's quality procedure."
        )
        st.dataframe(
            pd.DataFrame(
                [
                    {
                        "field": f.quantity.title,
                        "measured": None if f.measured is None else round(abs(f.measured), 2),
                        "U (k = 2)": None if f.U is None else round(f.U, 2),
                        "limit": round(f.limit, 2),
                        "zone": f.zone or "—",
                        "chance it conforms": "—"
                        if f.conformance_probability is None
                        else f"{f.conformance_probability:.0%}",
                        "decision": "pass" if f.passed else "fail",
                    }
                    for f in v.fields
                ]
            ).fillna("—"),
            hide_index=True,
        )
        budget = [
            {
                "field": f.quantity.label,
                "contribution": c.name,
                f"standard uncertainty ({f.quantity.unit})": round(c.u, 3),
                "type": c.type,
                "distribution": c.distribution,
                "source": c.source,
            }
            for f in v.fields
            if f.budget
            for c in f.budget.contributions
        ]
        if budget:
            with st.expander("Uncertainty budget (GUM, JCGM 100:2008)"):
                st.dataframe(pd.DataFrame(budget).fillna("—"), hide_index=True)

    @st.fragment
    def profile_panel():
        row = st.slider("Profile along row", 0, z.shape[0] - 1, z.shape[0] // 2, key="prow")
        x = (np.arange(z.shape[1]) - (z.shape[1] - 1) / 2) * d["dx_mm"]
        y_mm = ((z.shape[0] - 1) / 2 - row) * d["dx_mm"]
        view.chart(
            charts.profile(x, z[row], title=f"profile at y = {y_mm:+.1f} mm"),
            name=f"m{d['id']}-profile-row{row}",
            key="profile",
        )

    profile_panel()
    c1, c2 = st.columns(2)
    with c1:
        st.subheader("Zernike coefficients")
        st.caption("The 12 largest terms beyond piston and tilt; all terms in the table below.")
        view.chart(charts.zernike_bars(d["zernike"]), name=f"m{d['id']}-zernike", key="zbars")
    with c2:
        st.subheader("PSD bands")
        view.chart(charts.psd_bands(d["bands"]), name=f"m{d['id']}-psd-bands", key="psd")
    with st.expander("Coefficient table"):
        st.dataframe(
            view.table(
                d["zernike"],
                {
                    "n": "n",
                    "m": "m",
                    "ansi": "ANSI index",
                    "noll": "Noll index",
                    "term": "term",
                    "coef_nm": "coefficient (nm RMS)",
                },
                digits=3,
            ),
            hide_index=True,
        )
    with st.expander("Provenance"):
        st.dataframe(
            pd.DataFrame(
                [
                    ("file", d["source_name"]),
                    ("file SHA-256", d["sha256"]),
                    ("map blob", d["blob"]),
                    ("station", d["station"]),
                    ("reference calibration", d["reference"] or "—"),
                    (
                        "test wavelength",
                        f"{d['wavelength_nm']:g} nm"
                        if d["wavelength_nm"]
                        else "not given (heights in nm; no fringe output)",
                    ),
                    (
                        "analysis settings",
                        view.words(d["settings"]),
                    ),
                    ("settings SHA-256", d["settings_hash"]),
                    ("software version", d["software_version"]),
                    ("status", d["status"]),
                ],
                columns=["item", "value"],
            ),
            hide_index=True,
        )
