"""Shop records at a glance: what the database holds."""

from __future__ import annotations

import streamlit as st

from shopdb.services.queries import record_counts
from shopdb.ui import state


@st.cache_data(ttl=30, show_spinner=False)
def _counts():
    with state.shop().read() as session:
        return record_counts(session=session)


def render() -> None:
    state.require_role()
    st.header("Shop records")
    st.caption(f"Database: {state.shop().settings.database_url}")
    st.dataframe(_counts(), hide_index=True, use_container_width=False)
