"""shopdb app: sign-in, then the pages the signed-in user's role may see."""

from __future__ import annotations

import dataclasses
import time

import streamlit as st

from shopdb.errors import PermissionDenied, ShopdbError
from shopdb.services.session import current_account, sign_in, sign_in_trusted
from shopdb.ui import state
from shopdb.ui.pages import (
    admin,
    control,
    floor,
    importer,
    measurement,
    part,
    references,
    release,
    stations,
    trends,
)

SAFETY = (
    "shopdb's verdicts support, and never replace, the customer's drawing and the shop's "
    "quality procedure. Interferometers use lasers: follow your local laser-safety rules."
)


def _sign_in_page() -> None:
    st.title("shopdb")
    st.caption("Surface-figure records and process control")
    why = st.session_state.pop("signed_out_because", None)
    if why:
        st.info(why)
    with st.form("sign-in"):
        username = st.text_input("User name")
        password = st.text_input("Password", type="password")
        submitted = st.form_submit_button("Sign in")
    if submitted:
        try:
            st.session_state["who"] = sign_in(
                state.shop(), username.strip(), password, client=f"app:{st.context.ip_address}"
            )
        except (PermissionDenied, ShopdbError) as exc:
            st.error(str(exc))
        else:
            st.rerun()
    st.info(SAFETY)


def _sign_out(why: str | None = None) -> None:
    st.session_state.pop("who", None)
    st.session_state.pop("last_seen", None)
    if why:
        st.session_state["signed_out_because"] = why
    st.rerun()


def _still_signed_in(user):
    """The session's user if it may go on: signed out after the idle time, or once the account
    is disabled; a changed role takes effect at once."""
    now = time.monotonic()
    idle = state.shop().settings.idle_minutes
    last = st.session_state.get("last_seen")
    if last is not None and now - last > idle * 60:
        _sign_out(f"Signed out after {idle} minutes without activity.")
    st.session_state["last_seen"] = now
    current = current_account(state.shop(), user.username)
    if current is None:
        _sign_out("This account is disabled; ask an admin.")
    current = dataclasses.replace(current, via=user.via)
    if current != user:
        st.session_state["who"] = current
    return current


PAGES = {  # key: (section, title, module, url)
    "floor": ("Shop floor", "Floor", floor, "floor"),
    "part": ("Shop floor", "Part history", part, "part"),
    "measurement": ("Shop floor", "Measurement", measurement, "measurement"),
    "charts": ("Process", "Control charts", control, "charts"),
    "trends": ("Process", "Trends", trends, "trends"),
    "references": ("Metrology", "References", references, "references"),
    "stations": ("Metrology", "Stations", stations, "stations"),
    "release": ("Quality", "Lot release", release, "release"),
    "import": ("Shop floor", "Import", importer, "import"),
    "admin": ("Admin", "Administration", admin, "admin"),
}
HOME = {"manager": "trends", "metrology": "references", "qa": "release"}


def pages_for(role: str) -> dict[str, list]:
    """The navigation for a role: section -> pages (pages also check the role themselves)."""
    nav: dict[str, list] = {}
    by_key = {}
    home = HOME.get(role, "floor")
    for key, (section, title, module, url) in PAGES.items():
        if role in state.PAGE_ROLES[key]:
            page = st.Page(module.render, title=title, url_path=url, default=key == home)
            nav.setdefault(section, []).append(page)
            by_key[key] = page
    st.session_state["pages"] = by_key
    nav["Account"] = [st.Page(lambda: _sign_out(), title="Sign out", url_path="sign-out")]
    return nav


def main() -> None:
    st.set_page_config(page_title="shopdb", layout="wide")
    try:
        header = state.shop().settings.trusted_user_header
    except ShopdbError as exc:
        st.error(f"shopdb cannot open its database: {exc}")
        st.stop()
        return
    user = state.who()
    if user is None and header:
        name = st.context.headers.get(header)
        if name:
            try:
                user = st.session_state["who"] = sign_in_trusted(state.shop(), name.strip())
            except PermissionDenied as exc:
                st.error(str(exc))
                st.stop()
    if user is None:
        st.navigation(
            [st.Page(_sign_in_page, title="Sign in", url_path="sign-in")], position="hidden"
        ).run()
        return
    user = _still_signed_in(user)
    with st.sidebar:
        st.text(f"{user.display_name} · {user.role}")
    st.navigation(pages_for(user.role)).run()
    st.caption(SAFETY)


main()
