"""Every page under AppTest on the reduced demo: renders for each allowed role, refused otherwise;
chart specs carry their layers and rows; sign-in refuses a wrong password."""

from __future__ import annotations

import os
import re
import time
from pathlib import Path

import pytest

from shopdb.services.session import SignedIn

APP = str(Path(__file__).resolve().parents[2] / "ui" / "app.py")
ROLES = ("operator", "lead", "qa", "metrology", "manager", "admin")


@pytest.fixture
def demo_env(small_demo, monkeypatch):
    monkeypatch.setenv("SHOPDB_HOME", str(small_demo))
    monkeypatch.delenv("SHOPDB_DATABASE_URL", raising=False)
    monkeypatch.delenv("SHOPDB_BLOB_DIR", raising=False)
    import streamlit as st

    st.cache_resource.clear()
    st.cache_data.clear()
    return small_demo


@pytest.fixture
def demo_copy(small_demo, tmp_path, monkeypatch):
    """A copy of the demo for tests that write to it."""
    import shutil

    import streamlit as st

    home = tmp_path / "shop"
    shutil.copytree(small_demo, home)
    monkeypatch.setenv("SHOPDB_HOME", str(home))
    st.cache_resource.clear()
    st.cache_data.clear()
    return home


def _app(role: str | None):
    from streamlit.testing.v1 import AppTest

    # run from its text: from the file, AppTest would take ui/pages/*.py beside it for pages of
    # their own on a rerun (the real server, with st.navigation, does not)
    at = AppTest.from_string(Path(APP).read_text(encoding="utf-8"), default_timeout=120)
    if role:
        at.session_state["who"] = SignedIn(role, f"Demo {role}", role)
    return at


def _pages():
    from shopdb.ui import state
    from shopdb.ui.app import PAGES

    return [(key, role, role in state.PAGE_ROLES[key]) for key in PAGES for role in ROLES]


EXPECT = {
    "floor": "Parts in process",
    "part": "Measurements",
    "measurement": "Zernike coefficients",
    "charts": "Control charts",
    "references": "Impact",
    "stations": "Stations",
    "trends": "Trends",
    "admin": "Administration",
    "import": "Import measurements",
    "release": "Lot release",
}


@pytest.mark.slow
@pytest.mark.parametrize("key,role,allowed", _pages())
def test_page_renders_for_allowed_roles_only(demo_env, key, role, allowed):
    """Each page run on its own (as the router runs it), signed in as ``role``."""
    from streamlit.testing.v1 import AppTest

    from shopdb.ui.app import PAGES

    t = AppTest.from_string(_script(PAGES[key][2].__name__), default_timeout=120)
    t.session_state["who"] = SignedIn(role, f"Demo {role}", role)
    t.session_state["measurement_id"] = 40
    t.session_state["part_serial"] = "100-0400"
    start = time.perf_counter()
    t.run()
    elapsed = time.perf_counter() - start
    assert not t.exception, [e.value for e in t.exception]
    text = " ".join(
        str(x.value) for x in [*t.header, *t.subheader, *t.markdown, *t.caption, *t.error]
    )
    if allowed:
        assert EXPECT[key] in text, text[:400]
        assert elapsed < 30
        assert_people_words(t)
    else:
        assert "not available to your role" in text


SNAKE = re.compile(r"\b[a-z]+(?:_[a-z0-9]+)+\b")  # measurement_id, rms_nm, runs_to_spec
RAW = ("None", "nan", "NaN", "NaT", "+00:00")


def assert_people_words(t) -> None:
    """No raw key or Python value on screen: no snake_case table header, no None/nan/NaT or
    UTC offset in a cell, none of them in the page's text and metric labels (the issue's rule:
    headers from the catalogue, times in the shop's zone to the minute)."""
    for frame in t.dataframe:
        df = frame.value
        for column in df.columns:
            assert not SNAKE.fullmatch(str(column)), f"raw header {column!r}"
        for column in df.columns:
            for v in df[column]:
                cell = str(v)
                assert v is not None and cell not in RAW, f"{cell!r} in column {column!r}"
                assert "+00:00" not in cell, f"raw time {cell!r} in column {column!r}"
    words = [
        *(str(x.value) for x in [*t.header, *t.subheader, *t.caption, *t.info, *t.warning]),
        *(str(x.value) for x in [*t.success, *t.error]),
        *(f"{x.label} {x.value}" for x in t.metric),
    ]
    for text in words:
        text = re.sub(r"`[^`]*`", "", text)  # a callout quoted as written
        found = SNAKE.search(text)
        assert not found, f"raw key {found.group(0)!r} in {text[:120]!r}"
        for raw in ("None", "NaT", " nan", "+00:00"):
            assert raw not in text, f"{raw!r} in {text[:120]!r}"


def _script(module: str) -> str:
    return f"""
import streamlit as st
from {module.rsplit(".", 1)[0]} import {module.rsplit(".", 1)[1]} as page
st.session_state.setdefault("pages", {{}})
page.render()
"""


@pytest.mark.slow
def test_navigation_follows_the_role(demo_env):
    from shopdb.ui import state
    from shopdb.ui.app import PAGES

    for role in ROLES:
        at = _app(role)
        at.run()
        assert not at.exception
        keys = set(at.session_state["pages"].keys()) if "pages" in at.session_state else set()
        assert keys == {k for k in PAGES if role in state.PAGE_ROLES[k]}


@pytest.mark.slow
def test_sign_in_refuses_a_wrong_password_and_accepts_the_right_one(demo_env):
    at = _app(None)
    at.run()
    at.text_input[0].input("qa")
    at.text_input[1].input("not-the-password")
    at.button[0].click()
    at.run()
    assert any("wrong" in e.value for e in at.error)
    assert "who" not in at.session_state
    at.text_input[1].input("demo-qa-password")
    at.button[0].click()
    at.run()
    assert at.session_state["who"].role == "qa"


@pytest.mark.slow
def test_control_chart_spec_has_its_layers_and_rows(small_demo):
    from shopdb.config import load_settings
    from shopdb.services.reads import charts as chart_reads
    from shopdb.services.session import open_shop
    from shopdb.ui import charts

    shop = open_shop(load_settings(small_demo))
    with shop.read() as s:
        t = chart_reads.control_chart(
            session=s, metric="band:3", drawing="KR-100-W", by="machine", baseline=10
        )
    shop.engine.dispose()
    g = t[t["group"] == "CNC 3"]
    spec = charts.control_chart(g, title="x", y_title="nm").to_dict()
    marks = [layer["mark"]["type"] for layer in spec["layer"]]
    assert marks.count("line") == 4 and "circle" in marks  # centre, UCL, LCL, joined points
    assert "rule" in marks and "text" in marks  # the pad change, labelled
    data = spec["datasets"][next(iter(spec["datasets"]))]
    assert len(data) == len(g)
    states = {row["state"] for row in data}
    assert "deterioration" in states and "in control" in states
    assert any("pad " in row["change"] and "→" in row["change"] for row in data)
    import vl_convert  # the chart's download: its own spec rendered

    chart = charts.control_chart(g, title="x", y_title="nm")
    assert vl_convert.vegalite_to_png(chart.to_json()).startswith(b"\x89PNG")
    assert "<svg" in vl_convert.vegalite_to_svg(chart.to_json())


def test_ui_settings_are_shop_network_safe():
    from shopdb.cli.main import streamlit_command

    argv = streamlit_command(8501, "127.0.0.1")
    cmd = " ".join(argv)
    for flag in (
        "--server.enableXsrfProtection true",
        "--browser.gatherUsageStats false",
        "--server.fileWatcherType none",
        "--client.showErrorDetails none",
        "--client.toolbarMode viewer",
        "--server.maxUploadSize 64",
    ):
        assert flag in cmd
    assert argv[3] == "run" and os.path.exists(argv[4])


@pytest.mark.slow
def test_qa_disposes_and_signs_a_lot_in_the_app(demo_copy):
    """On a copy of the demo: QA rejects every part of the open lot, a wrong password signs
    nothing, the right one signs; the signature then verifies on the page."""
    from streamlit.testing.v1 import AppTest

    t = AppTest.from_string(_script("shopdb.ui.pages.release"), default_timeout=120)
    t.session_state["who"] = SignedIn("qa", "Imre Calloway", "qa")
    t.run()
    assert not t.exception, [e.value for e in t.exception]
    code = t.selectbox(key="lot-choice").value
    assert code == "L-2606"
    parts = list(t.selectbox(key=f"dispose-part-{code}").options)
    for serial in parts:
        # the form moves on to the next part without a disposition by itself
        assert t.selectbox(key=f"dispose-part-{code}").value == serial
        t.selectbox(key=f"dispose-decision-{code}-{serial}").set_value("reject")
        t.text_input(key=f"dispose-reason-{code}-{serial}").input("irregularity over B")
        t.button(key=f"dispose-submit-{code}-{serial}").click()
        t.run()
        assert not t.error, [e.value for e in t.error]
    t.radio(key=f"sign-meaning-{code}").set_value("rejected")
    t.text_input(key=f"sign-password-{code}").input("wrong-password-x")
    t.button(key="sign-submit").click()
    t.run()
    assert any(e.value == "the password is wrong; nothing was signed" for e in t.error)
    t.text_input(key=f"sign-password-{code}").input("demo-qa-password")
    t.button(key="sign-submit").click()
    t.run()
    # the signed lot stays on screen with its signature
    assert t.selectbox(key="lot-choice").value == "L-2606"
    text = " ".join(str(x.value) for x in t.success)
    assert "Signed **rejected** by Imre Calloway" in text and "evidence verifies" in text


@pytest.mark.slow
def test_admin_adds_a_user_and_a_drawing_with_a_checked_callout(demo_copy):
    from streamlit.testing.v1 import AppTest

    t = AppTest.from_string(_script("shopdb.ui.pages.admin"), default_timeout=120)
    t.session_state["who"] = SignedIn("admin", "Ada Quillfeather", "admin")
    t.run()
    assert not t.exception, [e.value for e in t.exception]
    t.text_input(key="user-name").input("inspector2")
    t.text_input(key="user-display").input("Second Inspector")
    t.selectbox(key="user-role").set_value("qa")
    t.text_input(key="user-pw1").input("second-inspector-pw")
    t.text_input(key="user-pw2").input("second-inspector-pw")
    t.button(key="user-submit").click()
    t.run()
    assert not t.error, [e.value for e in t.error]
    assert "inspector2" in t.dataframe[0].value["user"].tolist()
    t.text_input(key="dwg-number").input("KR-300-X")
    t.text_input(key="dwg-rev").input("A")
    t.text_input(key="dwg-callout").input("3/0.5 0.1; λ = 632.8 nm")
    t.button(key="dwg-submit").click()
    t.run()
    # the callout is checked; the message is shown as Markdown with its brackets escaped
    assert any("expected '('" in e.value.replace("\\", "") for e in t.error), t.error


@pytest.mark.slow
def test_control_charts_open_on_the_trouble_and_a_lead_closes_an_episode(demo_copy):
    """The page opens on the watched chart with the most open signals (the demo's pad change on
    CNC 3: KR-100-W, phases on); a lead records cause and action for an episode, which is then
    handled, and the floor counts one open episode fewer."""
    from streamlit.testing.v1 import AppTest

    from shopdb.services import signals
    from shopdb.ui import state

    with state.shop().read() as s:
        summary, open_before = signals.watched(session=s)
    top = summary.iloc[0]
    t = AppTest.from_string(_script("shopdb.ui.pages.control"), default_timeout=120)
    t.session_state["who"] = SignedIn("lead", "Tomas Brightwater", "lead")
    t.run()
    assert not t.exception, [e.value for e in t.exception]
    assert t.selectbox(key="cc-drawing").value == top["drawing"] == "KR-100-W"
    assert t.selectbox(key="cc-metric").value == top["metric"]
    assert t.toggle(key="cc-phase").value is True
    group = top["groups"].split(", ")[0]
    form_inputs = [w for w in t.text_input if "Assignable cause" in w.label]
    assert form_inputs, "the response form is offered to a lead"
    form_inputs[0].input("pad P-22 glazed")
    next(w for w in t.text_input if w.label == "Action taken").input("pad dressed; parts re-run")
    next(b for b in t.button if b.label == "Record").click()
    t.run()
    assert not t.error, [e.value for e in t.error]
    with state.shop().read() as s:
        _, open_after = signals.watched(session=s)
        _, eps = signals.chart_and_episodes(
            session=s, metric=top["metric"], drawing="KR-100-W", by="machine", phase_by="pad"
        )
    handled = eps[eps["status"] == "handled"]
    assert len(handled) == 1 and handled.iloc[0]["group"] == group
    assert handled.iloc[0]["cause"] == "pad P-22 glazed"
    assert len(open_after) == len(open_before) - 1


@pytest.mark.slow
def test_user_text_is_shown_as_typed_not_as_markdown(demo_copy):
    """A drawing title holding a link and an external image: the release page shows the
    characters, escaped, so no link or image is rendered (common practice: render user text as
    text)."""
    from streamlit.testing.v1 import AppTest

    from shopdb.services import masterdata as md
    from shopdb.services.users import get_user
    from shopdb.ui import state

    evil = "[win](http://evil.example) ![x](http://evil.example/p.png) **loud**"
    with state.shop().write() as s:
        admin = get_user(session=s, username="admin")
        d = md.add_drawing(
            session=s,
            actor=admin,
            number="KR-999-X",
            revision="A",
            title=evil,
            surface_form_callout="3/0.5(0.1); λ = 632.8 nm",
            test_wavelength_nm=632.8,
            clear_aperture_mm=40.0,
        )
        md.add_lot(session=s, actor=admin, code="L-EVIL", drawing_id=d.id)
    t = AppTest.from_string(_script("shopdb.ui.pages.release"), default_timeout=120)
    t.session_state["who"] = SignedIn("qa", "Imre Calloway", "qa")
    t.session_state["lot-choice"] = "L-EVIL"
    t.run()
    assert not t.exception, [e.value for e in t.exception]
    shown = " ".join(str(x.value) for x in [*t.markdown, *t.info])
    assert "\\[win\\]\\(http\\:" in shown and "\\!\\[x\\]" in shown and "\\*\\*loud" in shown
    assert "[win](http" not in shown


@pytest.mark.slow
def test_a_disabled_account_and_an_idle_session_are_signed_out(demo_copy, monkeypatch):
    from shopdb.services import users
    from shopdb.ui import state

    at = _app("lead")
    at.run()
    assert not at.exception and "who" in at.session_state
    with state.shop().write() as s:
        users.disable_user(
            session=s, actor=users.get_user(session=s, username="admin"), username="lead"
        )
    at.run()
    assert "who" not in at.session_state
    assert any("disabled" in str(i.value) for i in at.info)
    at = _app("qa")
    at.run()
    assert "who" in at.session_state
    at.session_state["last_seen"] = at.session_state["last_seen"] - 31 * 60
    at.run()
    assert "who" not in at.session_state
    assert any("30 minutes without activity" in str(i.value) for i in at.info)


@pytest.mark.slow
def test_a_session_signed_in_by_the_proxy_header_types_its_password_to_decide(demo_copy):
    """Signed in by the trusted header nobody typed a password: a disposition asks for it (a
    wrong one records nothing), as a signature always does (21 CFR 11.200(a)(1)(i): each
    signing after the first in a session by at least one component, from memory)."""
    from streamlit.testing.v1 import AppTest

    from shopdb.services import release
    from shopdb.ui import state

    t = AppTest.from_string(_script("shopdb.ui.pages.release"), default_timeout=120)
    t.session_state["who"] = SignedIn("qa", "Imre Calloway", "qa", via="proxy")
    t.run()
    assert not t.exception, [e.value for e in t.exception]
    code = t.selectbox(key="lot-choice").value
    serial = t.selectbox(key=f"dispose-part-{code}").value
    t.selectbox(key=f"dispose-decision-{code}-{serial}").set_value("reject")
    t.text_input(key=f"dispose-reason-{code}-{serial}").input("irregularity over B")
    t.text_input(key=f"dispose-pw-{code}").input("not-my-password")
    t.button(key=f"dispose-submit-{code}-{serial}").click()
    t.run()
    assert any("password is wrong; nothing was recorded" in e.value for e in t.error)
    with state.shop().read() as s:
        ev = release.lot_evidence(session=s, code=code)
    assert next(p for p in ev["parts"] if p["serial"] == serial)["disposition"] is None
    t.text_input(key=f"dispose-pw-{code}").input("demo-qa-password")
    t.button(key=f"dispose-submit-{code}-{serial}").click()
    t.run()
    assert not t.error, [e.value for e in t.error]


@pytest.mark.slow
def test_the_part_page_shows_what_each_run_removed_and_ranks_the_laps(demo_copy):
    from streamlit.testing.v1 import AppTest

    t = AppTest.from_string(_script("shopdb.ui.pages.part"), default_timeout=120)
    t.session_state["who"] = SignedIn("lead", "Tomas Brightwater", "lead")
    t.session_state["part_serial"] = "150-0100"
    t.run()
    assert not t.exception, [e.value for e in t.exception]
    assert any(h.value == "What each run removed" for h in t.subheader)
    removed = next(d.value for d in t.dataframe if "Removal RMS (nm)" in d.value.columns)
    assert len(removed) >= 1 and (removed["Removal RMS (nm)"] > 0).all()
    assert any(c.startswith("after / before, over") for c in removed.columns)
    t.toggle(key="rank-150-0100").set_value(True)
    t.run()
    assert not t.exception, [e.value for e in t.exception]
    text = " ".join(str(m.value) for m in t.markdown)
    assert "Irregularity now" in text and "after one more run" in text


@pytest.mark.slow
def test_the_lead_plans_and_records_the_next_cnc_run_on_the_part_page(demo_copy):
    from streamlit.testing.v1 import AppTest

    t = AppTest.from_string(_script("shopdb.ui.pages.part"), default_timeout=120)
    t.session_state["who"] = SignedIn("lead", "Tomas Brightwater", "lead")
    t.session_state["part_serial"] = "100-0603"
    t.run()
    t.toggle(key="plan-100-0603").set_value(True)
    t.run()
    assert not t.exception, [e.value for e in t.exception]
    text = " ".join(str(m.value) for m in t.markdown)
    assert "Total dwell" in text and "predicted verdict" in text
    numbers = next(d.value for d in t.dataframe if "Predicted" in d.value.columns)
    rms = numbers.set_index("")["Predicted"]["RMS (nm)"]
    assert rms < numbers.set_index("")["Now"]["RMS (nm)"]
    t.button(key="plan-record-100-0603").click()
    t.run()
    assert not t.error, [e.value for e in t.error]
    assert any("Recorded as plan" in str(s.value) for s in t.success)


@pytest.mark.slow
def test_the_control_chart_page_charts_each_machines_preston_coefficient(demo_copy):
    from streamlit.testing.v1 import AppTest

    t = AppTest.from_string(_script("shopdb.ui.pages.control"), default_timeout=120)
    t.session_state["who"] = SignedIn("lead", "Tomas Brightwater", "lead")
    t.run()
    t.toggle(key="cc-machines").set_value(True)
    t.run()
    assert not t.exception, [e.value for e in t.exception]
    assert "CNC 3" in {h.value for h in t.subheader}  # the machines of the chosen drawing
    assert any("mean removal RMS" in str(m.value) for m in t.markdown)
    specs = [str(c.proto.spec) for c in t.get("vega_lite_chart")]
    assert any("Preston" in spec for spec in specs)
    assert any("planned against achieved" in spec for spec in specs)
