"""One part's history: measurements, convergence, maps and removal between runs."""

from __future__ import annotations

import streamlit as st

from shopdb.surface import image
from shopdb.ui import charts, state


def render() -> None:
    state.require_page("part")
    st.header("Part history")
    parts = state.choices()["parts"]
    if not parts:
        st.info("No parts yet.")
        return
    default = st.session_state.get("part_serial")
    serial = st.selectbox("Part", parts, index=parts.index(default) if default in parts else 0)
    h = state.part(serial)
    st.caption(
        f"{h['drawing']} — {h['title']} · callout `{h['callout']}` · lot {h['lot'] or '—'} · status **{h['status']}**"
    )
    conv = h["convergence"]
    c = conv["convergence"]
    col1, col2 = st.columns([3, 2])
    with col1:

        @st.fragment
        def convergence_panel():
            if conv["per_run"].empty:
                st.info("No polishing runs measured yet.")
                return
            st.altair_chart(
                charts.convergence(
                    conv["per_run"], tolerance=conv["tolerance"], y_title=conv["metric"]
                ),
                width="stretch",
            )

        convergence_panel()
    with col2:
        if c is not None:
            st.metric("status", c.status)
            if c.ratio is not None:
                st.write(f"convergence ratio per run: **{c.ratio:.2f}**, floor {c.floor:.1f} nm")
            if c.runs_remaining is not None:
                lo, hi = c.runs_interval or (None, None)
                rng = (
                    f" (5–95 %: {lo:.0f} to {'never' if hi == float('inf') else f'{hi:.0f}'})"
                    if lo is not None
                    else ""
                )
                st.write(
                    f"forecast: **{c.runs_remaining:.0f}** more runs to {conv['tolerance']:.1f} nm{rng}"
                )
            for note in c.notes:
                st.caption(note)
    meas = h["measurements"]
    st.subheader("Measurements")
    view = meas[
        [
            "measurement_id",
            "measured_at",
            "iteration",
            "machine",
            "station",
            "rms_nm",
            "irregularity_nm",
            "sag_nm",
            "verdict",
        ]
    ]
    picked = st.dataframe(
        view,
        hide_index=True,
        on_select="rerun",
        selection_mode="multi-row",
        key="meas",
        column_config={
            c: st.column_config.NumberColumn(format="%.2f")
            for c in ("rms_nm", "irregularity_nm", "sag_nm")
        },
    )
    rows = picked.selection.rows
    if len(rows) == 1 and st.button("Open this measurement"):
        state.open_measurement(int(view.iloc[rows[0]]["measurement_id"]))
    if len(rows) == 2:
        a, b = sorted(int(view.iloc[r]["measurement_id"]) for r in rows)
        rem = state.removal(a, b)
        png, lo, hi = image.render(rem["map_nm"])
        st.write(
            f"Removed between measurement {a} and {b}: PV {rem['pv_nm']:.1f} nm, RMS {rem['rms_nm']:.1f} nm"
        )
        st.image(png, width=420)
        st.image(image.colour_bar(lo, hi))
    else:
        st.caption(
            "Select one measurement to open it, or two to see the material removed between them."
        )
