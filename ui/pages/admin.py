"""Administration: users and roles, drawings and callouts, stations, machines, record counts."""

from __future__ import annotations

import streamlit as st

from shopdb.errors import ShopdbError
from shopdb.services import masterdata, users
from shopdb.ui import state, view


def _do(label: str, fn, **kw) -> None:
    try:
        state.write(fn, **kw)
    except ShopdbError as exc:
        st.error(view.esc(exc))
    else:
        st.toast(view.esc(label))
        st.rerun()


def render() -> None:
    who = state.require_page("admin")
    st.header("Administration")
    lists = state.admin_lists()
    tabs = st.tabs(["Users", "Drawings", "Stations", "Machines", "Records"])
    with tabs[0]:
        if who.role != "admin":
            st.info("User accounts are managed by an admin.")
        else:
            st.dataframe(lists["users"], hide_index=True, width="stretch")
            _users(lists["users"]["user"].tolist())
    with tabs[1]:
        st.dataframe(lists["drawings"], hide_index=True, width="stretch")
        _drawing_form()
    with tabs[2]:
        st.dataframe(lists["stations"], hide_index=True, width="stretch")
        st.caption("Stations and their ingest profiles are added with `shopdb add station`.")
    with tabs[3]:
        st.dataframe(lists["machines"], hide_index=True, width="stretch")
        with st.form("add-machine", clear_on_submit=True):
            c1, c2 = st.columns(2)
            name = c1.text_input("Machine name", key="machine-name")
            kind = c2.text_input("Kind (e.g. CNC polisher, pitch lap)", key="machine-kind")
            if st.form_submit_button("Add machine", key="machine-submit"):
                _do(f"machine {name} added", masterdata.add_machine, name=name.strip(), kind=kind)
    with tabs[4]:
        st.caption(f"Database: {view.esc(_without_password(state.shop().settings.database_url))}")
        st.dataframe(state.counts(), hide_index=True, width="content")


def _users(names: list[str]) -> None:
    roles = list(users.ROLES)
    c1, c2 = st.columns(2)
    with c1.form("add-user", clear_on_submit=True):
        st.markdown("**Add a user**")
        username = st.text_input("User name", key="user-name")
        display = st.text_input("Printed name (used on signatures)", key="user-display")
        role = st.selectbox("Role", roles, key="user-role")
        pw1 = st.text_input("Password (at least 12 characters)", type="password", key="user-pw1")
        pw2 = st.text_input("Password again", type="password", key="user-pw2")
        if st.form_submit_button("Add user", key="user-submit"):
            if pw1 != pw2:
                st.error("the two passwords differ")
            else:
                _do(
                    f"user {username} added",
                    users.add_user,
                    username=username.strip(),
                    display_name=display.strip(),
                    role=role,
                    password=pw1,
                )
    with c2.form("change-user"):
        st.markdown("**Change a user**")
        name = st.selectbox("User", names, key="change-user")
        new_role = st.selectbox("New role", roles, key="change-role")
        reason = st.text_input("Reason", key="change-reason")
        b1, b2 = st.columns(2)
        if b1.form_submit_button("Set role", key="change-submit"):
            _do(
                f"{name} is now {new_role}",
                users.set_role,
                username=name,
                role=new_role,
                reason=reason,
            )
        if b2.form_submit_button("Disable account", key="disable-submit"):
            _do(f"{name} disabled", users.disable_user, username=name, reason=reason)
    st.caption(
        "Accounts are disabled, never deleted: their signatures and audit events stay attributable."
    )


def _drawing_form() -> None:
    with st.form("add-drawing", clear_on_submit=False):
        c1, c2, c3 = st.columns([2, 1, 3])
        number = c1.text_input("Drawing number", key="dwg-number")
        revision = c2.text_input("Revision", key="dwg-rev")
        title = c3.text_input("Title", key="dwg-title")
        callout = st.text_input(
            "Surface form callout (ISO 10110-5)",
            placeholder="3/0.5(0.1/0.05); λ = 632.8 nm",
            key="dwg-callout",
        )
        c4, c5, c6 = st.columns(3)
        wl = c4.number_input("Test wavelength (nm)", value=632.8, min_value=1.0, key="dwg-wl")
        ca = c5.number_input("Clear aperture (mm)", value=50.0, min_value=0.1, key="dwg-ca")
        vf = c6.number_input(
            "Minimum valid fraction", value=0.95, min_value=0.01, max_value=1.0, key="dwg-vf"
        )
        if st.form_submit_button("Add drawing", key="dwg-submit"):
            _do(
                f"drawing {number} added",
                masterdata.add_drawing,
                number=number.strip(),
                revision=revision.strip(),
                title=title,
                surface_form_callout=callout,
                test_wavelength_nm=wl,
                clear_aperture_mm=ca,
                min_valid_fraction=vf,
            )


def _without_password(url: str) -> str:
    """A database URL as it may be shown: the password replaced by ***."""
    from urllib.parse import urlsplit, urlunsplit

    parts = urlsplit(url)
    if parts.password is None:
        return url
    netloc = parts.netloc.replace(f":{parts.password}@", ":***@", 1)
    return urlunsplit(parts._replace(netloc=netloc))
