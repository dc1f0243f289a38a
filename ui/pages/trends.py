"""Trends for managers: yield, rework, scrap and iterations, with a Pareto of failure reasons."""

from __future__ import annotations

import streamlit as st

from shopdb.ui import charts, state, view

SHARES = {
    "first_pass_yield": "first-pass yield",
    "rework_rate": "rework rate",
    "scrap_rate": "scrap rate",
    "conditional_rate": "within U at first inspection",
}


def _share(k, column: str) -> str:
    return f"{(k[column] * k['inspected']).sum() / k['inspected'].sum():.0%}"


def render() -> None:
    state.require_page("trends")
    st.header("Trends")
    by = st.radio("By", ["month", "drawing", "machine"], horizontal=True, key="trend-by")
    k, p = state.kpis(by)
    if k.empty:
        st.info("No part has reached a final inspection yet.")
        return
    c1, c2, c3, c4, c5 = st.columns(5)
    c1.metric("first-pass yield (all)", _share(k, "first_pass_yield"))
    c2.metric("rework rate", _share(k, "rework_rate"))
    c3.metric("scrap rate", _share(k, "scrap_rate"))
    c4.metric(
        "within U at first inspection",
        _share(k, "conditional_rate"),
        help="parts whose first final inspection had a field inside its uncertainty range "
        "(ISO 14253-1): neither conformance nor non-conformance proven",
    )
    c5.metric(
        "mean runs to spec",
        f"{(k['mean_iterations'] * k['inspected']).sum() / k['inspected'].sum():.1f}",
    )
    view.chart(charts.kpi_lines(k, SHARES, x_title=by), name=f"kpi-by-{by}", key="kpi")
    last = k.iloc[-1]
    st.caption(
        f"Shares of the parts whose first final inspection fell in each {by}; "
        f"latest {by} {view.esc(last['group'])}: {int(last['inspected'])} parts inspected."
    )
    st.subheader("Why parts failed their first final inspection")
    if p.empty:
        st.write("No failures.")
    else:
        view.chart(charts.pareto(p), name="failure-pareto", key="pareto")
    with st.expander("Table"):
        st.dataframe(
            view.table(
                k.rename(columns={"group": by}),
                [
                    by,
                    "inspected",
                    *SHARES,
                    "rework_cycles_per_part",
                    "mean_iterations",
                    "mean_cycle_days",
                ],
            ),
            hide_index=True,
        )
