"""Cached shop handle and the signed-in user, shared by every page."""

from __future__ import annotations

import streamlit as st

from shopdb.services.session import Shop, SignedIn, open_shop


@st.cache_resource(show_spinner=False)
def shop() -> Shop:
    return open_shop()


def who() -> SignedIn | None:
    return st.session_state.get("who")


def require_role(*roles: str) -> SignedIn:
    user = who()
    if user is None or (roles and user.role not in roles):
        st.error("This page is not available to your role.")
        st.stop()
    return user
