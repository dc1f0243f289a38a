"""The README's tables say what the code does: the quantities table is the catalogue
(shopdb.quantities), the format table the reader registry (shopdb.formats) — after the docs test
of sqlite-utils, which keeps its documented options in step with its code."""

from __future__ import annotations

import re
from pathlib import Path

from shopdb import quantities
from shopdb.formats import FORMATS

README = (Path(__file__).resolve().parents[1] / "README.md").read_text()


def _table(heading: str) -> list[list[str]]:
    """The rows of the first Markdown table after ``heading``, cells stripped of backticks."""
    section = README[README.index(heading) :]
    rows = []
    for line in section.splitlines()[1:]:
        if line.startswith("|"):
            rows.append([c.strip().strip("`") for c in line.strip().strip("|").split("|")])
        elif rows:
            break
    return rows[2:]  # after the header and its rule


def test_quantity_table_is_the_catalogue():
    expected = [
        [q.name, q.label, q.unit or "—", q.callout_field or "—"] for q in quantities.SCALARS
    ]
    rows = _table("### Quantities")
    assert rows[: len(expected)] == expected
    families = {r[0] for r in rows[len(expected) :]}
    assert families == {"z:N,M", "band:K"}
    assert quantities.parse_metric("z:3,-1").family == "zernike"
    assert quantities.for_field("band2").name == "band:2"


def test_format_table_is_the_registry():
    def bare(text: str) -> str:
        return re.sub(r"`", "", text)

    rows = [[bare(c) for c in r] for r in _table("### Files shopdb reads")]
    expected = [[f.name, ", ".join(f.suffixes), bare(f.description), f.axes] for f in FORMATS]
    assert rows == expected


def test_command_help_lists_every_reader():
    import subprocess
    import sys

    out = subprocess.run(
        [sys.executable, "-m", "shopdb.cli", "analyze", "--help"],
        capture_output=True,
        text=True,
        timeout=60,
    ).stdout
    assert all(f.name in out for f in FORMATS), out
