"""Reference optics: calibration history, drift per term, due date, impact list."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from shopdb.ui import charts, state


def render() -> None:
    state.require_page("references")
    st.header("Reference optics")
    refs = state.choices()["references"]
    if not refs:
        st.info("No reference optics recorded.")
        return
    c1, c2 = st.columns(2)
    ref = c1.selectbox("Reference", refs)
    term = c2.selectbox(
        "Quantity",
        ["2,0", "2,2", "2,-2", "rms"],
        format_func=lambda t: {
            "2,0": "power Z(2,0)",
            "2,2": "astigmatism Z(2,2)",
            "2,-2": "astigmatism Z(2,-2)",
            "rms": "RMS",
        }[t],
    )
    info = state.drift(ref, term)
    d = info["drift"]
    if info["overdue"]:
        st.error(
            f"Calibration overdue since {info['valid_until']:%Y-%m-%d}: measurements against {ref} are refused until it is recalibrated."
        )
    else:
        st.success(
            f"Calibrated {info['last_calibration']:%Y-%m-%d}, valid until {info['valid_until']:%Y-%m-%d}."
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
        st.altair_chart(
            charts.drift(info["calibrations"], band, y_title=f"{term} (nm)"),
            width="stretch",
        )
    st.subheader("Impact: verdicts the predicted drift would change")
    imp = state.impact(ref)
    if imp.empty:
        st.write("None.")
    else:
        st.warning(
            f"{len(imp)} measurements in lots {', '.join(sorted(set(imp['lot'].dropna())))} would change verdict."
        )
        st.dataframe(imp, hide_index=True)
