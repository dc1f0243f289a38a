"""Reference optics: calibration history, drift per term, due date, and the verdicts the
predicted drift would change (each row opens its lot)."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from shopdb.ui import charts, state, view

TERMS = {
    "2,0": "power Z(2,0)",
    "2,2": "astigmatism Z(2,2)",
    "2,-2": "astigmatism Z(2,-2)",
    "rms": "RMS",
}


def render() -> None:
    state.require_page("references")
    st.header("Reference optics")
    refs = state.choices()["references"]
    if not refs:
        st.info("No reference optics recorded.")
        return
    if st.session_state.get("ref-choice") not in refs:
        st.session_state["ref-choice"] = refs[0]
    c1, c2 = st.columns(2)
    ref = c1.selectbox("Reference", refs, key="ref-choice")
    term = c2.selectbox("Quantity", list(TERMS), format_func=TERMS.get, key="ref-term")
    info = state.drift(ref, term)
    d = info["drift"]
    if info["overdue"]:
        st.error(
            f"Calibration overdue since {info['valid_until']:%Y-%m-%d}: measurements against "
            f"{view.esc(ref)} are refused until it is recalibrated."
        )
    else:
        st.success(
            f"Calibrated {info['last_calibration']:%Y-%m-%d}, valid until "
            f"{info['valid_until']:%Y-%m-%d}."
        )
    if d is None:
        st.info("At least three calibrations are needed for a drift estimate.")
    else:
        m1, m2, m3 = st.columns(3)
        m1.metric(
            "drift",
            f"{d.rate_per_month:+.2f} nm/month",
            help=f"95 % CI {d.rate_ci[0]:+.2f} to {d.rate_ci[1]:+.2f}",
        )
        m2.metric(
            "predicted change since last calibration", f"{d.predicted_change_since_last:+.2f} nm"
        )
        m3.metric("calibrations", d.n)
        band = pd.DataFrame(
            {"when": d.band_times, "low": d.band_low, "high": d.band_high, "fit": d.fit_line}
        )
        view.chart(
            charts.drift(info["calibrations"], band, y_title=f"{TERMS[term]} (nm)"),
            name=f"drift-{ref}-{term}".replace(",", "_"),
            key="drift",
        )
        st.caption(
            "The line is the fitted drift with its 95 % prediction band; dots are calibrations."
        )
    st.subheader("Impact: verdicts the predicted drift would change")
    imp = state.impact(ref)
    if imp.empty:
        st.write("None.")
        return
    lots = sorted(set(imp["lot"].dropna()))
    st.warning(
        f"{len(imp)} measurements in lots {view.esc(', '.join(lots) or '—')} would change "
        "verdict. "
        "Pick a row to open its lot (or its part when it is in no lot)."
    )
    picked = st.dataframe(
        view.table(
            imp,
            ["part", "lot", "lot_status", "measured_at", "verdict", "verdict_if_corrected"],
            tz=state.tz(),
        ),
        hide_index=True,
        on_select="rerun",
        selection_mode="single-row",
        key="impact",
    )
    if picked.selection.rows:
        row = imp.iloc[picked.selection.rows[0]]
        if isinstance(row["lot"], str):
            state.open_lot(row["lot"])
        else:
            state.open_part(row["part"])
