"""Stations: each station's check-standard chart."""

from __future__ import annotations

import streamlit as st

from shopdb.config import local_time
from shopdb.errors import ShopdbError
from shopdb.ui import charts, state, view


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
        view.chart(
            charts.control_chart(t, title=f"{station}: check standard RMS", y_title="RMS (nm)"),
            name=f"check-standard-{station}".replace(" ", "-"),
            key=f"st-{station}",
        )
        if not fired.empty:
            last = fired.iloc[-1]
            st.warning(
                f"{view.esc(station)}: {len(fired)} signals; latest "
                f"{local_time(last['measured_at'], state.tz())} — {last['explanation']}"
            )
    _gage_study()


def _gage_study() -> None:
    """Gage R&R of a station from a study file (parts x operators x trials)."""
    import pandas as pd

    from shopdb.services.metrology import gage_study

    st.subheader("Gage R&R study")
    st.caption(
        "Upload a crossed study as CSV with columns part, operator, trial, value (AIAG MSA 4th ed. "
        "average-and-range and ANOVA methods). Bands (common practice): %GRR under 10 % "
        "acceptable, 10–30 % may be acceptable, over 30 % not; ndc at least 5."
    )
    c1, c2 = st.columns([3, 1])
    upload = c1.file_uploader("Study file", type=["csv"], key="grr-file")
    tolerance = c2.number_input(
        "Tolerance width (blank: none)",
        min_value=0.0,
        value=None,
        key="grr-tol",
        help="the width of the tolerance the station judges (e.g. the irregularity limit in "
        "nm); gives %GRR of the tolerance",
    )
    if upload is None:
        return
    try:
        study = gage_study(upload.getvalue(), name=upload.name, tolerance=tolerance or None)
    except ShopdbError as exc:
        st.error(view.esc(exc))
        return
    results = study.results
    k, n, r = study.shape
    st.markdown(f"**{view.esc(upload.name)}**: {n} parts × {k} operators × {r} trials")
    st.dataframe(
        pd.DataFrame(
            [
                {
                    "method": g.method,
                    "repeatability EV": round(g.ev, 3),
                    "reproducibility AV": round(g.av, 3),
                    "interaction": round(g.interaction, 3),
                    "GRR": round(g.grr, 3),
                    "part variation PV": round(g.pv, 3),
                    "%GRR": round(g.pct_grr, 1),
                    "%GRR of tolerance": (
                        f"{g.pct_grr_tolerance:.1f}" if g.pct_grr_tolerance else "—"
                    ),
                    "ndc": g.ndc,
                    "verdict": g.verdict,
                }
                for g in results
            ]
        ),
        hide_index=True,
        width="stretch",
    )
