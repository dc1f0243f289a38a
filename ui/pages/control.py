"""Control charts: limits, zones and the rules that fired, in plain words; click a point to open it."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from shopdb.errors import ShopdbError
from shopdb.ui import charts, state


def render() -> None:
    state.require_page("charts")
    st.header("Control charts")
    ch = state.choices()
    c1, c2, c3, c4 = st.columns(4)
    drawings = ch["drawings"]
    options = state.chart_quantities(drawings[0] if drawings else None)
    by_title = {q.title: q for q in options}
    metric_label = c1.selectbox("Metric", list(by_title))
    # one drawing by default: parts of different sizes do not belong on one chart
    drawing = c2.selectbox("Drawing", [*ch["drawings"], "all"])
    by = c3.selectbox("One chart per", ["machine", "station", "drawing", "nothing"])
    kind = c4.selectbox(
        "Chart",
        ["imr", "ewma", "cusum"],
        format_func={"imr": "individuals", "ewma": "EWMA", "cusum": "CUSUM"}.get,
    )
    phase = st.checkbox("New limits after each pad change (phases)", value=False)
    rules = st.radio("Rules", ["nelson", "western-electric", "limits"], horizontal=True)
    metric = by_title[metric_label].name

    @st.fragment
    def chart_panel():
        t = state.chart(
            metric,
            None if drawing == "all" else drawing,
            None if by == "nothing" else by,
            kind,
            "pad" if phase else None,
            rules,
        )
        if t.empty:
            st.info("Not enough data for this chart.")
            return
        for group, g in t.groupby("group"):
            fired = g[g["rules"].map(len) > 0]
            ev = st.altair_chart(
                charts.control_chart(g, title=f"{group}: {metric_label}", y_title=metric_label),
                width="stretch",
                on_select="rerun",
                key=f"cc-{group}",
            )
            sel = (ev.selection or {}).get("point") if ev else None
            if sel:
                state.open_measurement(int(sel[0]["measurement_id"]))
            if not fired.empty:
                with st.expander(f"{len(fired)} signals on {group}"):
                    st.dataframe(
                        fired[
                            [
                                "measured_at",
                                "part",
                                "statistic",
                                "zone",
                                "explanation",
                                "signal",
                                "measurement_id",
                            ]
                        ].assign(measured_at=lambda x: pd.to_datetime(x["measured_at"])),
                        hide_index=True,
                    )
        st.caption(
            "Click a point to open its measurement. Limits come from each chart's first 20 points (or each phase's)."
        )

    chart_panel()

    with st.expander("Capability of this metric"):
        usl = st.number_input("Upper specification limit (same unit)", min_value=0.0, value=0.0)
        if usl > 0 and drawing != "all":
            try:
                c = state.capability(metric, drawing, usl)
                st.write(
                    f"Cpu {c.cpk:.2f} (95 % CI {c.cpk_ci[0]:.2f}–{c.cpk_ci[1]:.2f}), Ppu {c.ppk:.2f}, "
                    f"percentile Ppu {c.percentile_ppk:.2f} — {c.method_note}; n = {c.n} parts (last value each)"
                )
            except ShopdbError as exc:
                st.warning(str(exc))
