"""A real browser on a real server: `shopdb ui` on the reduced demo, driven by Playwright in Debian's
Chromium. Screenshots go to a temporary folder (SHOPDB_SCREENSHOTS to keep them elsewhere)."""

from __future__ import annotations

import json
import os
import re
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

CHROMIUM = "/usr/bin/chromium"
PAGES = [
    ("Floor", "Parts in process"),
    ("Part history", "Measurements"),
    ("Control charts", "One chart per"),
    ("Trends", "first-pass yield"),
    ("References", "Impact"),
    ("Stations", "check standard"),
    ("Measurement", "Find a measurement"),
    ("Import", "Import measurements"),
]


def _settle(page) -> None:
    """Wait until the script run is over and its tables and charts have painted."""
    page.wait_for_load_state("networkidle")
    page.wait_for_selector('[data-testid="stStatusWidget"]', state="detached", timeout=60_000)
    page.wait_for_timeout(1500)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def server(small_demo, tmp_path):
    if not Path(CHROMIUM).exists():
        if os.environ.get("SHOPDB_TEST_BROWSER") == "require":
            pytest.fail(
                "Chromium is required for the browser test but /usr/bin/chromium is missing"
            )
        pytest.skip("no /usr/bin/chromium (apt-get install chromium)")
    pytest.importorskip("playwright")
    import shutil

    home = tmp_path / "shop"  # a copy: the import step below writes to it
    shutil.copytree(small_demo, home)
    port = _free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("SHOPDB_")}
    proc = subprocess.Popen(
        [sys.executable, "-m", "shopdb.cli", "ui", "--home", str(home), "--port", str(port)],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    url = f"http://127.0.0.1:{port}"
    for _ in range(120):
        try:
            if urllib.request.urlopen(f"{url}/_stcore/health", timeout=1).read() == b"ok":
                break
        except OSError:
            time.sleep(0.5)
    else:
        proc.kill()
        pytest.fail("the app server did not come up")
    yield url, home
    proc.terminate()
    proc.wait(20)


CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]


def _sign_in(page, url: str, username: str, password: str) -> None:
    page.goto(url)
    page.get_by_role("textbox", name="User name").fill(username)
    page.get_by_role("textbox", name="Password").fill(password)
    page.get_by_role("button", name="Sign in").click()


def _choose(page, label: str, option) -> None:
    """Pick ``option`` (text or pattern) in the select box labelled ``label``."""
    box = page.get_by_role("combobox", name=label)
    box.click()
    page.wait_for_timeout(300)
    if box.get_attribute("aria-expanded") != "true":  # a click just after a rerun may only focus
        box.press("ArrowDown")
    page.get_by_role("listbox").wait_for(timeout=10_000)
    page.get_by_role("option", name=option).first.click()
    _settle(page)


def _cli(home: Path, *args: str, password: str | None = None) -> str:
    env = {k: v for k, v in os.environ.items() if not k.startswith("SHOPDB_")}
    env["SHOPDB_HOME"] = str(home)
    if password:
        env["SHOPDB_PASSWORD"] = password
    out = subprocess.run(
        [sys.executable, "-m", "shopdb.cli", *args], env=env, capture_output=True, text=True
    )
    assert out.returncode == 0, out.stderr
    return out.stdout


def _cli_json(home: Path, *args: str):
    return json.loads(_cli(home, *args, "--json"))


@pytest.mark.slow
def test_sign_in_and_every_page_in_chromium(server, tmp_path):
    from playwright.sync_api import sync_playwright

    server, _ = server
    shots = Path(os.environ.get("SHOPDB_SCREENSHOTS", tmp_path))
    shots.mkdir(parents=True, exist_ok=True)
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, headless=True, args=CHROMIUM_ARGS)
        page = browser.new_page(viewport={"width": 1400, "height": 1000})
        page.goto(server)
        page.get_by_role("textbox", name="User name").fill("qa")
        page.get_by_role("textbox", name="Password").fill("wrong-password-here")
        page.get_by_role("button", name="Sign in").click()
        page.get_by_text("user name or password is wrong").first.wait_for(timeout=30_000)
        page.get_by_role("textbox", name="Password").fill("demo-qa-password")
        t0 = time.perf_counter()
        page.get_by_role("button", name="Sign in").click()
        # QA lands on the lot-release page
        page.get_by_role("heading", name="Lot release").wait_for(timeout=60_000)
        page.wait_for_selector('[data-testid="stStatusWidget"]', state="detached", timeout=60_000)
        sign_in_to_home = time.perf_counter() - t0
        _settle(page)
        page.screenshot(path=str(shots / "lot-release.png"), full_page=True)
        assert page.get_by_text("Re-enter your password", exact=False).count() == 0  # 1/4 disposed
        for title, expect in PAGES:
            page.get_by_role("link", name=title).click()
            page.get_by_text(expect, exact=False).first.wait_for(timeout=60_000)
            _settle(page)
            page.screenshot(
                path=str(shots / f"{title.lower().replace(' ', '-')}.png"), full_page=True
            )
            if title == "Floor":
                assert page.get_by_text("references due or overdue").first.is_visible()
                assert page.get_by_text("open signal episodes").first.is_visible()
            if title == "Stations":  # a gage study uploaded through the page
                page.locator('input[type="file"]').set_input_files(str(_study_csv(tmp_path)))
                found = page.get_by_text("10 parts × 3 operators × 3 trials")
                found.wait_for(timeout=60_000)
                _settle(page)
                found.scroll_into_view_if_needed()
                page.screenshot(path=str(shots / "stations-gage-study.png"), full_page=True)
            if title == "Import":  # one file through the page, as `shopdb ingest` takes it
                page.locator('input[type="file"]').set_input_files(str(_map_file(tmp_path)))
                page.get_by_role("button", name="Import").click()
                page.get_by_text("1 of 1 files recorded").wait_for(timeout=60_000)
                _settle(page)
                page.screenshot(path=str(shots / "import-done.png"), full_page=True)
                # a malformed file: one line naming it, no stack trace, paths or source lines
                broken = tmp_path / "broken.x3p"
                broken.write_bytes(b"PK\x03\x04 not really a zip")
                page.locator('input[type="file"]').set_input_files(str(broken))
                page.get_by_role("button", name="Import").click()
                # the uploader keeps the first file beside it: that one is now a duplicate
                page.get_by_text(re.compile(r"files recorded; .*1 rejected")).wait_for(
                    timeout=60_000
                )
                _settle(page)
                body = page.locator("body").inner_text()
                assert "broken.x3p" in body and "Traceback" not in body
                assert "site-packages" not in body and 'File "' not in body
        # a click-through: part history -> one measurement selected -> its page
        page.get_by_role("link", name="Control charts").click()
        _settle(page)
        assert page.locator(".vega-embed").count() >= 1  # the charts drew
        # click one control-chart point: its measurement page opens
        points = page.locator(".vega-embed g.mark-symbol.role-mark path")
        assert points.count() > 10
        label = points.nth(5).get_attribute("aria-label")
        fields = dict(f.split(": ", 1) for f in label.split("; ") if ": " in f)
        points.nth(5).click(force=True)
        page.get_by_text("Zernike coefficients").first.wait_for(timeout=60_000)
        _settle(page)
        assert fields["measurement"]  # the point names its measurement in words
        assert page.get_by_text(f"Part {fields['part']} ·").first.is_visible()
        assert page.locator(".js-plotly-plot").count() >= 2  # the map in 2-D and 3-D
        page.screenshot(path=str(shots / "chart-click-measurement.png"), full_page=True)
        browser.close()
    print(f"sign-in to lot release drawn: {sign_in_to_home:.2f} s; screenshots in {shots}")
    assert sign_in_to_home < 30
    taken = {f"{t.lower().replace(' ', '-')}.png" for t, _ in PAGES}
    taken |= {"lot-release.png", "stations-gage-study.png", "import-done.png"}
    assert all(
        (shots / name).stat().st_size > 0 for name in taken | {"chart-click-measurement.png"}
    )


def _study_csv(folder: Path) -> Path:
    """The AIAG worked-example study (see tests/spc/test_msa.py) as the page takes it."""
    from ..spc.test_msa import CUBE

    lines = ["part,operator,trial,value"]
    for o in range(3):
        for p in range(10):
            lines += [f"P{p + 1},{'ABC'[o]},{t + 1},{CUBE[o, p, t]}" for t in range(3)]
    path = folder / "grr-study.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def _map_file(folder: Path) -> Path:
    from shopdb.formats import write_map
    from shopdb.seed_demo.factories import disk_map

    path = folder / "upload-1.x3p"
    write_map(path, disk_map({(2, 0): 20.0, (2, 2): 4.0}, npix=96, diameter_mm=100.0))
    return path


@pytest.mark.slow
def test_two_dispositions_in_a_row_land_on_the_chosen_lot_and_parts(server, tmp_path):
    """QA records two dispositions in a row on a lot that is not the first, changing part and
    decision in between: both land on that lot's parts with their own reasons, and the reason
    box is empty before the second (common practice: a form writes the record it shows)."""
    from playwright.sync_api import expect, sync_playwright

    url, home = server
    # a lot that sorts before the demo's open lot, so that one is not the first in the picker
    admin = ("--as", "admin")
    _cli(home, "add", "lot", "L-2599", "--drawing", "KR-150-S", *admin, password="demo-admin-pass")
    _cli(
        home,
        "add",
        "part",
        "150-9999",
        "--drawing",
        "KR-150-S",
        "--lot",
        "L-2599",
        *admin,
        password="demo-admin-pass",
    )
    lots = [r["lot"] for r in _cli_json(home, "lot", "list")]
    code = next(c for c in lots[1:] if c != "L-2599")
    serials = [p["serial"] for p in _cli_json(home, "lot", "show", code)["parts"]]
    first, second = serials[1], serials[2]
    shots = Path(os.environ.get("SHOPDB_SCREENSHOTS", tmp_path))
    shots.mkdir(parents=True, exist_ok=True)
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, headless=True, args=CHROMIUM_ARGS)
        page = browser.new_page(viewport={"width": 1400, "height": 1000})
        _sign_in(page, url, "qa", "demo-qa-password")
        page.get_by_role("heading", name="Lot release").wait_for(timeout=60_000)
        _settle(page)
        _choose(page, "Lot", re.compile(re.escape(code)))
        reason = page.get_by_label("Reason (needed unless plainly accepted)")
        for serial, decision, why in (
            (first, "reject", "edge chip at 4 o'clock"),
            (second, "rework", "zone at 70 % of the radius"),
        ):
            _choose(page, "Part", serial)
            _choose(page, "Decision", re.compile(f"^{decision}$"))
            expect(reason).to_have_value("")
            reason.fill(why)
            page.get_by_role("button", name="Record disposition").click()
            page.get_by_text(f"{serial}: {decision} recorded").first.wait_for(timeout=60_000)
            _settle(page)
            # the page still shows the chosen lot
            assert page.get_by_role("combobox", name="Lot").input_value().startswith(code)
        page.screenshot(path=str(shots / "two-dispositions.png"), full_page=True)
        # picking a row of the parts table sets that part in the form
        grid = page.get_by_test_id("stDataFrame").first
        grid.scroll_into_view_if_needed()
        box = grid.bounding_box()
        row = serials.index(serials[3])
        page.mouse.click(box["x"] + 15, box["y"] + 35 * (row + 1) + 17)  # its row's check box
        _settle(page)
        assert page.get_by_role("combobox", name="Part").input_value() == serials[3]
        browser.close()
    shown = {p["serial"]: p["disposition"] for p in _cli_json(home, "lot", "show", code)["parts"]}
    assert shown[first]["decision"] == "reject"
    assert shown[first]["reason"] == "edge chip at 4 o'clock"
    assert shown[second]["decision"] == "rework"
    assert shown[second]["reason"] == "zone at 70 % of the radius"
    assert all(r["disposed"] == 0 for r in _cli_json(home, "lot", "list") if r["lot"] != code)
