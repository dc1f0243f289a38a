"""App page speed on the full demo, in AppTest timing (run by hand):

    python tests/bench/bench_pages.py [DEMO_HOME]

DEMO_HOME defaults to the demo folder `shopdb demo` builds. For each page: the first render with
empty caches (the cost a user meets when opening it) and a second render (cached queries). On
the control-chart page also a filter change (another metric) after the first render.
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

from streamlit.testing.v1 import AppTest

from shopdb.services.session import SignedIn

PAGES = [  # (module, role)
    ("floor", "lead"),
    ("part", "lead"),
    ("measurement", "lead"),
    ("control", "lead"),
    ("trends", "manager"),
    ("references", "metrology"),
    ("stations", "metrology"),
    ("release", "qa"),
    ("importer", "operator"),
    ("admin", "admin"),
]


def _script(module: str) -> str:
    return f"""
import streamlit as st
from shopdb.ui.pages import {module} as page
st.session_state.setdefault("pages", {{}})
page.render()
"""


def main() -> None:
    from shopdb.seed_demo.build import default_demo_home

    home = Path(sys.argv[1]) if len(sys.argv) > 1 else default_demo_home()
    os.environ["SHOPDB_HOME"] = str(home)
    os.environ.pop("SHOPDB_DATABASE_URL", None)
    os.environ.pop("SHOPDB_BLOB_DIR", None)
    import streamlit as st

    print(f"demo at {home}")
    for module, role in PAGES:
        st.cache_data.clear()
        st.cache_resource.clear()
        t = AppTest.from_string(_script(module), default_timeout=300)
        t.session_state["who"] = SignedIn(role, role, role)
        t.session_state["measurement_id"] = 400
        t.session_state["part_serial"] = "100-0400"
        t0 = time.perf_counter()
        t.run()
        first = time.perf_counter() - t0
        assert not t.exception, [e.value for e in t.exception]
        t0 = time.perf_counter()
        t.run()
        again = time.perf_counter() - t0
        line = f"{module:<12} first render {first:6.2f} s   cached {again:5.2f} s"
        if module == "control":
            t.selectbox[0].set_value("RMS")
            t0 = time.perf_counter()
            t.run()
            line += f"   filter change {time.perf_counter() - t0:5.2f} s"
        print(line)


if __name__ == "__main__":
    main()
