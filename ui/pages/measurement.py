"""One measurement: the map, a profile, coefficients, PSD bands, verdict and provenance."""

from __future__ import annotations

import numpy as np
import pandas as pd
import streamlit as st

from shopdb.errors import ShopdbError
from shopdb.surface import image
from shopdb.ui import charts, state


def render() -> None:
    state.require_page("measurement")
    st.header("Measurement")
    mid = st.number_input(
        "Measurement id", min_value=1, step=1, value=int(st.session_state.get("measurement_id", 1))
    )
    try:
        d = state.measurement(int(mid))
    except ShopdbError as exc:
        st.warning(str(exc))
        return
    st.caption(
        f"part **{d['part']}** · {d['drawing']} · run {d['iteration'] or '—'} on {d['machine'] or '—'} · "
        f"{d['station']} · {pd.Timestamp(d['measured_at']):%Y-%m-%d %H:%M} UTC"
    )
    left, right = st.columns([3, 2])
    with left:
        png, lo, hi = image.render(d["map_nm"])
        st.image(
            png,
            width=512,
            caption=f"surface height, {d['map_nm'].shape[1]} × {d['map_nm'].shape[0]} px at "
            f"{d['dx_mm']:.3f} mm (as stored: reference-subtracted where the station does so)",
        )
        st.image(image.colour_bar(lo, hi))
    with right:
        r = d["result"]
        st.metric("PV / RMS", f"{r['pv_nm']:.1f} / {r['rms_nm']:.2f} nm")
        st.metric("PVr", f"{r['pvr_nm']:.1f} nm")
        v = d["verdict"]
        if v.fields:
            say = {"pass": st.success, "fail": st.error, "blocked": st.warning}[v.verdict]
            say(
                f"against `{d['callout']}`: **{v.verdict}**"
                + (f" — {'; '.join(v.reasons)}" if v.reasons else " — meets every field")
            )
            st.altair_chart(charts.verdict_fields([f.as_dict() for f in v.fields]), width="stretch")
            st.caption(
                f"Decision rule **{v.fields[0].rule}**. The bar is the measured value ± U "
                "(expanded uncertainty, k = 2); the yellow band lies between the limit and what "
                "the rule accepts."
            )
            st.dataframe(
                pd.DataFrame(
                    [
                        {
                            "field": f.quantity.label,
                            "measured": None if f.measured is None else abs(f.measured),
                            "U (k = 2)": f.U,
                            "limit": f.limit,
                            "unit": f.quantity.unit,
                            "zone": f.zone or "—",
                            "chance it conforms": "—"
                            if f.conformance_probability is None
                            else f"{f.conformance_probability:.0%}",
                            "result": "pass" if f.passed else "fail",
                        }
                        for f in v.fields
                    ]
                ),
                hide_index=True,
                column_config={
                    c: st.column_config.NumberColumn(format="%.2f")
                    for c in ("measured", "limit", "U (k = 2)")
                },
            )
            with st.expander("Uncertainty budget"):
                st.dataframe(
                    pd.DataFrame(
                        [
                            {
                                "field": f.quantity.label,
                                "contribution": c.name,
                                "u": c.u,
                                "type": c.type,
                                "distribution": c.distribution,
                                "source": c.source,
                            }
                            for f in v.fields
                            if f.budget
                            for c in f.budget.contributions
                        ]
                    ),
                    hide_index=True,
                    column_config={
                        "u": st.column_config.NumberColumn("u (standard)", format="%.3f")
                    },
                )
        st.caption(
            "The verdict supports, and does not replace, the customer's drawing and the shop's quality procedure."
        )

    @st.fragment
    def profile_panel():
        z = d["map_nm"]
        row = st.slider("Profile row", 0, z.shape[0] - 1, z.shape[0] // 2)
        prof = pd.DataFrame({"x_mm": np.arange(z.shape[1]) * d["dx_mm"], "height_nm": z[row]})
        st.line_chart(prof.dropna(), x="x_mm", y="height_nm", height=200)

    profile_panel()
    c1, c2 = st.columns(2)
    with c1:
        st.subheader("Zernike coefficients")
        st.altair_chart(charts.zernike_bars(d["zernike"]), width="stretch")
    with c2:
        st.subheader("PSD bands")
        st.altair_chart(charts.psd_bands(d["bands"]), width="stretch")
    with st.expander("Coefficient table"):
        st.dataframe(d["zernike"], hide_index=True)
    with st.expander("Provenance"):
        st.json(
            {
                "file": d["source_name"],
                "file_sha256": d["sha256"],
                "map_blob": d["blob"],
                "station": d["station"],
                "reference_calibration": d["reference"],
                "wavelength_nm": d["wavelength_nm"],
                "analysis_settings": d["settings"],
                "settings_hash": d["settings_hash"],
                "software_version": d["software_version"],
                "status": d["status"],
            }
        )
