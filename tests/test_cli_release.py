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


def test_audit_export_writes_the_trail_a_reviewer_can_recompute(home, tmp_path):
    """The exported events re-hash to the exported head by the chain's rule alone
    (row_hash = SHA-256(prev_hash || canonical JSON), canonical JSON after RFC 8785's sorted
    keys and no white space), so a reviewer checks the trail without shopdb."""
    import csv
    import hashlib
    import json

    h = ["--home", str(home)]
    head, events = tmp_path / "head.json", tmp_path / "events.csv"
    r = run("audit", "export", "-o", str(head), "--events", str(events), *h)
    assert r.returncode == 0, r.stderr
    with events.open(encoding="utf-8", newline="") as fh:
        rows = list(csv.DictReader(fh))
    prev = "0" * 64
    for row in rows:
        body = {
            k: row[k] for k in ("occurred_at", "actor", "action", "table_name", "record_id")
        } | {
            "reason": row["reason"],
            "before": json.loads(row["before"]) if row["before"] else None,
            "after": json.loads(row["after"]) if row["after"] else None,
        }
        text = json.dumps(body, sort_keys=True, separators=(",", ":"), allow_nan=False)
        assert row["prev_hash"] == prev
        prev = hashlib.sha256((prev + text).encode()).hexdigest()
        assert row["row_hash"] == prev, row["id"]
    assert json.loads(head.read_text())["head_hash"] == prev and len(rows) > 100
    as_json = tmp_path / "events.json"
    assert run("audit", "export", "-o", str(head), "--events", str(as_json), *h).returncode == 0
    assert [e["row_hash"] for e in json.loads(as_json.read_text())] == [r["row_hash"] for r in rows]
    bad, head2 = tmp_path / "events.xlsx", tmp_path / "head2.json"
    r = run("audit", "export", "-o", str(head2), "--events", str(bad), *h)
    assert r.returncode != 0 and "--events" in r.stderr and "csv" in r.stderr
    assert not bad.exists() and not head2.exists()
