"""The floor: what needs attention now. Every row opens its part, chart or reference."""

from __future__ import annotations

import streamlit as st

from shopdb.services.signals import RECENT_DAYS
from shopdb.ui import state, view

ATTENTION = ("stalled", "diverging", "not converging")


def render() -> None:
    state.require_page("floor")
    st.header("Floor")
    f = state.floor()
    wip, refs = f["wip"], f["references"]
    _, episodes = state.watched()
    tz = state.tz()
    trouble = wip[wip["status"].isin(ATTENTION)] if not wip.empty else wip
    due = refs[refs["state"] != "valid"] if not refs.empty else refs
    c1, c2, c3, c4 = st.columns(4)
    c1.metric("parts in process", len(wip))
    c2.metric("parts stalled or diverging", len(trouble))
    c3.metric(
        "open signal episodes",
        len(episodes),
        help=f"episodes of control-chart signals in the last {RECENT_DAYS} days on the watched "
        "charts (mid-spatial band and RMS of each drawing, one chart per machine) with no "
        "recorded cause and action",
    )
    c4.metric("references due or overdue", len(due))

    st.subheader("Parts in process")
    if wip.empty:
        st.info("No part is in process.")
    else:
        st.caption(
            "Stalled and diverging parts first. Runs to spec is the forecast from the part's own "
            "convergence, with its 5–95 % range. Pick a row to open the part."
        )
        picked = st.dataframe(
            view.table(
                wip,
                {
                    "part": None,
                    "drawing": None,
                    "machine": None,
                    "iteration": "last run",
                    "status": None,
                    "quantity": "judged on",
                    "latest": "latest (nm)",
                    "tolerance": "limit (nm)",
                    "runs_to_spec": None,
                    "interval": None,
                    "last_measured": None,
                },
                tz=tz,
                digits=1,
            ),
            hide_index=True,
            on_select="rerun",
            selection_mode="single-row",
            key="wip",
        )
        if picked.selection.rows:
            state.open_part(wip.iloc[picked.selection.rows[0]]["part"])

    left, right = st.columns(2)
    with left:
        st.subheader("Open signal episodes")
        if episodes.empty:
            st.success(f"No open episode of control-chart signals in the last {RECENT_DAYS} days.")
        else:
            st.caption("Pick a row to open its control chart and record the cause and action.")
            picked = st.dataframe(
                view.table(
                    episodes,
                    {
                        "drawing": None,
                        "label": "quantity",
                        "group": "machine",
                        "first": "from",
                        "last": "to",
                        "signals": "signals",
                        "what": "latest signal",
                    },
                    tz=tz,
                ),
                hide_index=True,
                on_select="rerun",
                selection_mode="single-row",
                key="floor-episodes",
            )
            if picked.selection.rows:
                row = episodes.iloc[picked.selection.rows[0]]
                state.open_chart(row["drawing"], row["metric"], "machine")
    with right:
        st.subheader("Reference calibrations")
        if refs.empty:
            st.info("No reference calibration recorded.")
        else:
            picked = st.dataframe(
                view.table(
                    refs,
                    ["reference", "state", "last_calibration", "valid_until", "days_left"],
                    tz=tz,
                ),
                hide_index=True,
                on_select="rerun",
                selection_mode="single-row",
                key="floor-refs",
            )
            for r in refs[refs["state"] == "overdue"].itertuples():
                st.error(
                    f"{view.esc(r.reference)}: calibration ran out {r.valid_until:%Y-%m-%d}; stations "
                    "using it cannot take measurements."
                )
            if picked.selection.rows:
                state.open_reference(refs.iloc[picked.selection.rows[0]]["reference"])
