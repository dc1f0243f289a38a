"""Shop records at a glance: what the database holds."""

from __future__ import annotations

import streamlit as st

from shopdb.ui import state


def render() -> None:
    state.require_page("records")
    st.header("Shop records")
    st.caption(f"Database: {state.shop().settings.database_url}")
    st.dataframe(state.counts(), hide_index=True, use_container_width=False)
