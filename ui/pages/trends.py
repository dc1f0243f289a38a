"""Trends for managers: yield, rework, scrap and iterations, with a Pareto of failure reasons."""

from __future__ import annotations

import streamlit as st

from shopdb.ui import charts, state


def render() -> None:
    state.require_page("trends")
    st.header("Trends")
    by = st.radio("By", ["month", "drawing", "machine"], horizontal=True)
    k, p = state.kpis(by)
    if k.empty:
        st.info("No part has reached a final inspection yet.")
        return
    last = k.iloc[-1]
    c1, c2, c3, c4, c5 = st.columns(5)
    c1.metric(
        "first-pass yield (all)",
        f"{(k['first_pass_yield'] * k['inspected']).sum() / k['inspected'].sum():.0%}",
    )
    c2.metric(
        "rework rate", f"{(k['rework_rate'] * k['inspected']).sum() / k['inspected'].sum():.0%}"
    )
    c3.metric(
        "scrap rate", f"{(k['scrap_rate'] * k['inspected']).sum() / k['inspected'].sum():.0%}"
    )
    c4.metric(
        "within U at first inspection",
        f"{(k['conditional_rate'] * k['inspected']).sum() / k['inspected'].sum():.0%}",
        help="parts whose first final inspection had a field inside its uncertainty range "
        "(ISO 14253-1): neither conformance nor non-conformance proven",
    )
    c5.metric("mean runs to spec", f"{k['mean_iterations'].mean():.1f}")
    st.altair_chart(
        charts.kpi_lines(k, ["first_pass_yield", "rework_rate", "scrap_rate"]),
        width="stretch",
    )
    st.caption(f"Latest group {last['group']}: {int(last['inspected'])} parts inspected.")
    st.subheader("Why parts failed their first final inspection")
    if p.empty:
        st.write("No failures.")
    else:
        st.altair_chart(charts.pareto(p), width="stretch")
    with st.expander("Table"):
        st.dataframe(k, hide_index=True)
