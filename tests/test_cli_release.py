"""Release commands on a copy of the demo shop: sign-off evidence, certificate, audit head."""

from __future__ import annotations

import shutil
import sqlite3

import pytest

from .test_cli import run

QA = {"SHOPDB_USER": "qa", "SHOPDB_PASSWORD": "demo-qa-password"}


@pytest.fixture
def home(small_demo, tmp_path):
    dst = tmp_path / "shop"
    shutil.copytree(small_demo, dst)
    return dst


def _tamper(home, sql):
    con = sqlite3.connect(home / "shopdb.sqlite3")
    for (name,) in con.execute("SELECT name FROM sqlite_master WHERE type = 'trigger'").fetchall():
        con.execute(f'DROP TRIGGER "{name}"')
    con.execute(sql)
    con.commit()
    con.close()


def test_verify_certificate_and_audit_head(home, tmp_path):
    h = ["--home", str(home)]
    r = run("lot", "verify", "L-2600", *h, env=QA)
    assert r.returncode == 0 and "verifies" in r.stdout, r.stderr
    pdf = tmp_path / "L-2600.pdf"
    r = run("certificate", "L-2600", "-o", str(pdf), *h, env=QA)
    assert r.returncode == 0 and pdf.read_bytes().startswith(b"%PDF"), r.stderr
    head = tmp_path / "head.json"
    assert run("audit", "export", "-o", str(head), *h).returncode == 0
    assert run("audit", "verify", "--head", str(head), *h).returncode == 0

    _tamper(home, "UPDATE surface_result SET rms_nm = rms_nm * 0.9")
    r = run("lot", "verify", "L-2600", *h, env=QA)
    assert r.returncode == 1 and "DOES NOT VERIFY: the signed records changed" in r.stdout
    _tamper(home, "DELETE FROM audit_event WHERE id = (SELECT MAX(id) FROM audit_event)")
    assert run("audit", "verify", *h).returncode == 0  # a cut tail is a consistent chain...
    r = run("audit", "verify", "--head", str(head), *h)
    assert r.returncode == 1 and "newest events were removed" in r.stderr  # ...but not the head


def test_refusals_write_nothing(home, tmp_path):
    h = ["--home", str(home)]
    out = tmp_path / "open.pdf"
    r = run("certificate", "L-2606", "-o", str(out), *h, env=QA)
    assert r.returncode == 2 and "needs a released lot" in r.stderr and not out.exists()
    assert not list(tmp_path.glob("*.part"))
    r = run("lot", "sign", "L-2606", *h, env={**QA, "SHOPDB_PASSWORD": "wrong-password!"})
    assert r.returncode == 2 and "password is wrong" in r.stderr
    op = {"SHOPDB_USER": "operator", "SHOPDB_PASSWORD": "demo-operator-pw"}
    r = run(
        "lot", "dispose", "L-2606", "100-0600", "--decision", "reject", "--reason", "x", *h, env=op
    )
    assert r.returncode == 2 and "may not release" in r.stderr
    r = run("audit", "verify", "--head", str(tmp_path / "nope.json"), *h)
    assert r.returncode == 2 and "not a head file" in r.stderr
