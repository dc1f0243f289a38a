"""Stations: each station's check-standard chart."""

from __future__ import annotations

import streamlit as st

from shopdb.errors import ShopdbError
from shopdb.ui import charts, state


def render() -> None:
    state.require_page("stations")
    st.header("Stations")
    for station in state.choices()["stations"]:
        try:
            t = state.station_check(station)
        except ShopdbError:
            continue
        if t.empty:
            continue
        t = t.assign(part="check standard")
        fired = t[t["rules"].map(len) > 0]
        st.altair_chart(
            charts.control_chart(t, title=f"{station}: check standard RMS", y_title="RMS (nm)"),
            use_container_width=True,
            key=f"st-{station}",
        )
        if not fired.empty:
            last = fired.iloc[-1]
            st.warning(
                f"{station}: {len(fired)} signals; latest {last['measured_at']:%Y-%m-%d} — {last['explanation']}"
            )
