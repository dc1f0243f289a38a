"""The floor: what needs attention now."""

from __future__ import annotations

import streamlit as st

from shopdb.ui import state


def render() -> None:
    state.require_page("floor")
    st.header("Floor")
    f = state.floor()
    wip, signals, refs = f["wip"], f["signals"], f["references"]
    attention = (
        wip[wip["status"].isin(["stalled", "diverging", "not converging"])]
        if not wip.empty
        else wip
    )
    c1, c2, c3 = st.columns(3)
    c1.metric("parts in process", len(wip))
    c2.metric("need attention", len(attention))
    c3.metric(
        "references overdue", int((refs["state"] == "overdue").sum()) if not refs.empty else 0
    )
    st.subheader("Parts in process")
    if wip.empty:
        st.info("No part is in process.")
    else:
        st.caption(
            "Stalled and diverging parts first. Runs to spec is the forecast from the part's own convergence."
        )
        view = wip[
            [
                "part",
                "drawing",
                "machine",
                "iteration",
                "status",
                "latest",
                "tolerance",
                "runs_to_spec",
                "metric",
            ]
        ]
        picked = st.dataframe(
            view,
            hide_index=True,
            on_select="rerun",
            selection_mode="single-row",
            key="wip",
            column_config={
                "latest": st.column_config.NumberColumn("latest (nm)", format="%.1f"),
                "tolerance": st.column_config.NumberColumn("tolerance (nm)", format="%.1f"),
            },
        )
        if picked.selection.rows:
            state.open_part(view.iloc[picked.selection.rows[0]]["part"])
    left, right = st.columns(2)
    with left:
        st.subheader("Open signals (last 60 days)")
        if signals.empty:
            st.success("No control-chart signals in the last 60 days.")
        else:
            st.dataframe(
                signals[["machine", "metric", "signals", "latest", "what"]], hide_index=True
            )
    with right:
        st.subheader("Reference calibrations")
        if not refs.empty:
            st.dataframe(
                refs,
                hide_index=True,
                column_config={
                    "last_calibration": st.column_config.DatetimeColumn(format="YYYY-MM-DD"),
                    "valid_until": st.column_config.DatetimeColumn(format="YYYY-MM-DD"),
                },
            )
            for r in refs[refs["state"] == "overdue"].itertuples():
                st.error(
                    f"{r.reference}: calibration ran out {r.valid_until:%Y-%m-%d}; stations using it cannot take measurements."
                )
