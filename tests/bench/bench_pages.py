"""App page speed in a real browser on the full demo (run by hand):

    python tests/bench/bench_pages.py [DEMO_HOME] [--rounds N]

Starts `shopdb ui` on DEMO_HOME (default: the folder `shopdb demo` builds), signs in with
Playwright in Debian's Chromium (/usr/bin/chromium) as each role and times, from the click on a
page's link (or the sign-in button) to its main element drawn: the page's first chart or table
painted and the script run over. Goals from the issue: the first page after sign-in within 3 s,
every page after that within 1 s. Round 1 meets empty caches (the server just started); later
rounds are what a user meets once the shop's queries are warm (cached for 60 s).
"""

from __future__ import annotations

import os
import socket
import statistics
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

CHROMIUM = "/usr/bin/chromium"
PASSWORDS = {  # the demo's own accounts (printed by `shopdb demo`; demo only)
    "lead": "demo-lead-pass1",
    "qa": "demo-qa-password",
    "metrology": "demo-metro-pass",
    "manager": "demo-manager-pw",
    "operator": "demo-operator-pw",
}
HEADINGS = {"References": "Reference optics", "Import": "Import measurements"}
MAIN = {  # page link -> the element that shows the page is drawn
    "Floor": '[data-testid="stDataFrame"]',
    "Part history": '[data-testid="stVegaLiteChart"]',
    "Measurement": '[data-testid="stDataFrame"]',
    "Control charts": '[data-testid="stVegaLiteChart"]',
    "Trends": '[data-testid="stVegaLiteChart"]',
    "References": '[data-testid="stVegaLiteChart"]',
    "Stations": '[data-testid="stVegaLiteChart"]',
    "Lot release": '[data-testid="stVegaLiteChart"]',
    "Import": '[data-testid="stFileUploader"]',
}
ROUTES = {  # role -> its home page, then the pages it walks
    "lead": ["Floor", "Control charts", "Part history", "Measurement"],
    "qa": ["Lot release", "Measurement", "Floor"],
    "metrology": ["References", "Stations", "Control charts"],
    "manager": ["Trends", "Floor"],
    "operator": ["Floor", "Import"],
}


def _drawn(page, name: str) -> None:
    """The page's own heading, then its main element painted, and no script run going."""
    page.get_by_role("heading", name=HEADINGS.get(name, name), exact=True).wait_for(timeout=60_000)
    selector = MAIN[name]
    page.wait_for_selector(selector, state="visible", timeout=60_000)
    page.wait_for_selector('[data-testid="stStatusWidget"]', state="detached", timeout=60_000)
    page.wait_for_function(  # a chart's canvas or svg has painted
        """sel => { const e = document.querySelector(sel);
                    return e && (!e.matches('[data-testid="stVegaLiteChart"]')
                                 || e.querySelector('canvas, svg')); }""",
        arg=selector,
        timeout=60_000,
    )


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _walk(browser, url: str, role: str) -> list[tuple[str, float]]:
    context = browser.new_context(viewport={"width": 1500, "height": 1000})
    page = context.new_page()
    page.goto(url)
    page.get_by_label("User name").fill(role)
    page.get_by_label("Password", exact=True).fill(PASSWORDS[role])
    home, *rest = ROUTES[role]
    times = []
    start = time.perf_counter()
    page.get_by_role("button", name="Sign in").click()
    _drawn(page, home)
    times.append((home, time.perf_counter() - start))
    for name in rest:
        start = time.perf_counter()
        page.get_by_role("link", name=name, exact=True).click()
        _drawn(page, name)
        times.append((name, time.perf_counter() - start))
    context.close()
    return times


def main() -> None:
    from playwright.sync_api import sync_playwright

    argv = sys.argv[1:]
    rounds = 3
    if "--rounds" in argv:
        i = argv.index("--rounds")
        rounds = int(argv[i + 1])
        del argv[i : i + 2]
    from shopdb.seed_demo.build import default_demo_home

    home = Path(argv[0]) if argv else default_demo_home()
    port = _free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("SHOPDB_")}
    server = subprocess.Popen(
        [sys.executable, "-m", "shopdb.cli", "ui", "--home", str(home), "--port", str(port)],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    url = f"http://127.0.0.1:{port}"
    try:
        for _ in range(120):
            try:
                if urllib.request.urlopen(f"{url}/_stcore/health", timeout=1).read() == b"ok":
                    break
            except OSError:
                time.sleep(0.5)
        results: dict[tuple[str, str, bool], list[float]] = {}
        with sync_playwright() as p:
            browser = p.chromium.launch(executable_path=CHROMIUM)
            for r in range(rounds):
                for role in ROUTES:
                    for k, (name, took) in enumerate(_walk(browser, url, role)):
                        results.setdefault((role, name, k == 0), []).append(took)
                        print(f"round {r + 1} {role:9s} {name:15s} {took:5.2f} s", flush=True)
            browser.close()
    finally:
        server.terminate()
        server.wait(20)
    print(f"\n{home}, {os.cpu_count()} CPUs; goal: first page 3 s, later pages 1 s")
    print(f"{'role':9s} {'page':15s} {'round 1':>8s} {'later (median)':>15s}")
    for (role, name, first), took in results.items():
        later = statistics.median(took[1:]) if len(took) > 1 else float("nan")
        goal = 3.0 if first else 1.0
        mark = "ok" if later <= goal else "over"
        print(f"{role:9s} {name:15s} {took[0]:7.2f}s {later:14.2f}s  {goal:.0f} s {mark}")


if __name__ == "__main__":
    main()
