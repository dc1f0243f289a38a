"""The layering of shared/DESIGN.md: ui -> services -> core, nothing imports upward."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DB_OR_UI = (
    "sqlmodel",
    "sqlalchemy",
    "streamlit",
    "altair",
    "alembic",
    "psycopg",
    "shopdb.db",
    "shopdb.models",
    "shopdb.services",
    "shopdb.ui",
    "shopdb.cli",
    "shopdb.blobs",
)


def _imports(path: Path) -> list[str]:
    tree = ast.parse(path.read_text(), filename=str(path))
    names: list[str] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.append(node.module)
    return names


def _hits(folder: str, banned: tuple[str, ...]) -> list[str]:
    out = []
    for path in sorted((ROOT / folder).rglob("*.py")):
        for name in _imports(path):
            if any(name == b or name.startswith(b + ".") for b in banned):
                out.append(f"{path.relative_to(ROOT)} imports {name}")
    return out


@pytest.mark.parametrize("folder", ["shopdb/surface", "shopdb/spc", "shopdb/formats"])
def test_pure_layers_import_no_database_or_ui(folder):
    assert _hits(folder, DB_OR_UI) == []


def test_ui_talks_only_to_services():
    assert _hits("ui", ("sqlmodel", "sqlalchemy", "shopdb.db", "shopdb.models", "psycopg")) == []


SQL_OR_RECORDS = ("sqlmodel", "sqlalchemy", "psycopg", "shopdb.db", "shopdb.models")


@pytest.mark.parametrize("folder", ["shopdb/cli", "seed_demo"])
def test_command_line_and_demo_reach_records_through_services_only(folder):
    """The command line and the demo builder call services; no table, session or SQL there."""
    assert _hits(folder, SQL_OR_RECORDS) == []


def test_services_do_not_import_ui():
    assert _hits("shopdb/services", ("streamlit", "altair", "shopdb.ui", "shopdb.cli")) == []


def test_the_check_sees_a_violation(tmp_path):
    """The scanner itself must catch an offending import (so the tests above can fail)."""
    bad = tmp_path / "bad.py"
    bad.write_text("import sqlalchemy.orm\nfrom shopdb.services import x\n")
    assert _imports(bad) == ["sqlalchemy.orm", "shopdb.services"]
