"""A plain (non-editable) `pip install .` must carry ui/, migrations/ and seed_demo/."""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.slow
def test_wheel_ships_app_migrations_and_demo(tmp_path):
    r = subprocess.run(
        [
            sys.executable,
            "-m",
            "pip",
            "wheel",
            "--no-deps",
            "--no-build-isolation",
            "-q",
            "-w",
            str(tmp_path),
            str(ROOT),
        ],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert r.returncode == 0, r.stderr
    (wheel,) = tmp_path.glob("shopdb-*.whl")
    names = set(zipfile.ZipFile(wheel).namelist())
    for migration in (ROOT / "migrations" / "versions").glob("0*.py"):
        assert f"shopdb/migrations/versions/{migration.name}" in names
    for required in (
        "shopdb/ui/app.py",
        "shopdb/ui/pages/release.py",
        "shopdb/ui/.streamlit/config.toml",
        "shopdb/migrations/env.py",
        "shopdb/migrations/script.py.mako",
        "shopdb/seed_demo/build.py",
        "shopdb/cli/__init__.py",
    ):
        assert required in names, required
    # every module of the package, so a new subpackage cannot be left out of pyproject.toml
    for module in (ROOT / "shopdb").rglob("*.py"):
        assert f"shopdb/{module.relative_to(ROOT / 'shopdb').as_posix()}" in names, module
    assert not any(n.startswith(("tests/", "ui/", "migrations/")) for n in names)
