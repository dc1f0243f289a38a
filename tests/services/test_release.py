"""Lot release: verdict rules, dispositions, e-signatures, tamper evidence, authorisation.

What a signature must do is taken from the electronic-records rules the issue names: 21 CFR 11.50
(printed name, time, meaning), 11.70 (signature linked to its record so it cannot be moved),
11.200(a) (identity proved at signing: the password again), 11.10(e) (secure, time-stamped audit
trail that does not obscure earlier entries).
"""

from __future__ import annotations

import json
import os
import random
import subprocess
import sys
import threading
import time
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
import sqlalchemy as sa
from sqlmodel import select

from shopdb import models as m
from shopdb.errors import PermissionDenied, ShopdbError
from shopdb.formats import write_map
from shopdb.seed_demo.factories import basic_shop, disk_map
from shopdb.services import masterdata as md
from shopdb.services import release
from shopdb.services.audit import verify_chain
from shopdb.services.ingest import ingest
from shopdb.services.lookups import CHECK_DRAWING
from shopdb.services.users import add_user, get_user

DAY = datetime(2026, 2, 1, 8, 0, tzinfo=UTC)
PASSWORD = "qa-password-123"
ROLE_USERS = {
    "op": "operator",
    "lead": "lead",
    "qa1": "qa",
    "qa2": "qa",
    "metro": "metrology",
    "mgr": "manager",
}
GOOD = {(2, 0): 10.0, (2, 2): 2.0}  # sag 2*sqrt(3)*10 = 34.6 nm < A = 158.2 nm
COMA = {(2, 0): 10.0, (3, 1): 20.0}  # coma PV ~113 nm > B = 31.6 nm: irregularity fails


class World:
    def __init__(self, shop, admin, tmp_path):
        self.shop, self.tmp, self.n = shop, tmp_path, 0
        with shop.write() as s:
            w = basic_shop(
                s,
                admin,
                requires_reference=False,
                station_profile={"check_standard": "CS-1", "check_max_age_days": 7},
            )
            chk = md.add_drawing(
                session=s,
                actor=admin,
                number=CHECK_DRAWING,
                revision="A",
                surface_form_callout="3/1(0.5); λ = 632.8 nm",
                test_wavelength_nm=632.8,
                clear_aperture_mm=90.0,
            )
            md.add_part(session=s, actor=admin, serial="CS-1", drawing_id=chk.id)
            md.add_part(
                session=s,
                actor=admin,
                serial="W-0002",
                drawing_id=w["drawing"].id,
                lot_id=w["lot"].id,
            )
            for name, role in ROLE_USERS.items():
                add_user(
                    session=s,
                    actor=admin,
                    username=name,
                    display_name=f"{name.upper()} Person",
                    role=role,
                    password=PASSWORD,
                )
        self.drawing_id = w["drawing"].id
        for k in range(7):  # check-standard readings twice a day, in control
            self.measure("CS-1", {(2, 0): 3.0 + 0.05 * (k % 3)}, DAY + timedelta(hours=12 * k))

    def user(self, name):
        with self.shop.read() as s:
            return get_user(session=s, username=name)

    def measure(self, serial, coefs, when, *, by="op", dropout=0.0, operator=None):
        self.n += 1
        mp = disk_map(coefs, npix=64, noise_nm=0.3, rng=np.random.default_rng(self.n))
        if dropout:
            holes = np.random.default_rng(99).random(mp.height_nm.shape) < dropout
            mp = type(mp)(np.where(holes, np.nan, mp.height_nm), mp.dx_mm, mp.wavelength_nm)
        path = self.tmp / f"m{self.n}.x3p"
        write_map(path, mp)
        with self.shop.write() as s:
            return ingest(
                session=s,
                blobs=self.shop.blobs,
                actor=get_user(session=s, username=by),
                path=path,
                part_serial=serial,
                station_name="Bench 1",
                measured_at=when,
                operator=get_user(session=s, username=operator) if operator else None,
            ).measurement_id

    def evidence(self, code="L-0001"):
        with self.shop.read() as s:
            ev = release.lot_evidence(session=s, code=code)
        return {p["serial"]: p for p in ev["parts"]}, ev

    def dispose(self, serial, decision, by="qa1", **kw):
        with self.shop.write() as s:
            return release.dispose(
                session=s,
                actor=get_user(session=s, username=by),
                code=kw.pop("code", "L-0001"),
                serial=serial,
                decision=decision,
                **kw,
            )

    def sign(self, by="qa1", password=PASSWORD, meaning="released", **kw):
        with self.shop.write() as s:
            return release.sign(
                session=s,
                actor=get_user(session=s, username=by),
                code=kw.pop("code", "L-0001"),
                password=password,
                meaning=meaning,
                **kw,
            )

    def count(self, table):
        with self.shop.engine.connect() as conn:
            return conn.execute(sa.text(f"SELECT COUNT(*) FROM {table}")).scalar()


@pytest.fixture
def world(shop, admin, tmp_path):
    return World(shop, admin, tmp_path)


@pytest.fixture
def signed(world):
    world.measure("W-0001", GOOD, DAY + timedelta(days=3, hours=2))
    world.measure("W-0002", COMA, DAY + timedelta(days=3, hours=3))
    world.dispose("W-0001", "accept")
    world.dispose("W-0002", "reject", reason="irregularity over B")
    return world.sign()


def test_verdicts_pass_fail_and_blocked_with_reasons(world):
    world.measure("W-0001", GOOD, DAY + timedelta(days=3, hours=2))
    parts, _ = world.evidence()
    assert parts["W-0001"]["verdict"] == "pass" and not parts["W-0001"]["blocked"]
    assert parts["W-0002"]["verdict"] == "blocked"
    assert parts["W-0002"]["blocked"] == ["no valid measurement"]
    world.measure("W-0002", COMA, DAY + timedelta(days=3, hours=3))
    parts, _ = world.evidence()
    fields = {f["field"]: f for f in parts["W-0002"]["fields"]}
    assert parts["W-0002"]["verdict"] == "fail" and not fields["irregularity"]["passed"]
    assert fields["irregularity"]["limit"] == pytest.approx(0.1 * 632.8 / 2)


def test_a_measurement_before_the_last_run_is_not_final(world):
    world.measure("W-0001", GOOD, DAY + timedelta(days=3, hours=2))
    with world.shop.write() as s:
        md.start_run(
            session=s,
            actor=world.user("op"),
            part_serial="W-0001",
            machine_name="Polisher A",
            started_at=DAY + timedelta(days=3, hours=5),
        )
    parts, _ = world.evidence()
    assert parts["W-0001"]["blocked"] == ["no valid measurement after polishing run 1"]


def test_check_standard_out_of_control_blocks(world):
    world.measure("CS-1", {(2, 0): 9.0}, DAY + timedelta(days=3, hours=1))  # a jump: beyond 3 sigma
    world.measure("W-0001", GOOD, DAY + timedelta(days=3, hours=2))
    parts, _ = world.evidence()
    (reason,) = parts["W-0001"]["blocked"]
    assert "check standard CS-1 on Bench 1 was out of control on 2026-02-04" in reason


def test_stale_check_expired_calibration_and_low_valid_fraction_block(world):
    when = DAY + timedelta(days=100)  # the last check is 97 days old; TF-1 expired on day 59
    world.measure("W-0001", GOOD, when, dropout=0.2)
    parts, _ = world.evidence()
    reasons = " | ".join(parts["W-0001"]["blocked"])
    assert "no check of CS-1 on Bench 1 in the 7 days before 2026-05-12" in reasons
    assert "reference TF-1 calibration" in reasons and "was not valid on 2026-05-12" in reasons
    assert "below the drawing's minimum 95.0%" in reasons


def test_disposition_rules(world):
    world.measure("W-0002", COMA, DAY + timedelta(days=3, hours=3))
    with pytest.raises(ShopdbError, match="cannot be accepted: verdict fail"):
        world.dispose("W-0002", "accept")
    with pytest.raises(ShopdbError, match="needs a deviation number and a reason"):
        world.dispose("W-0002", "accept_deviation", reason="customer concession")
    with pytest.raises(ShopdbError, match="needs a reason"):
        world.dispose("W-0002", "reject")
    with pytest.raises(ShopdbError, match="not in lot"):
        world.dispose("CS-1", "reject", reason="x")
    before = world.count("disposition")
    d1 = world.dispose("W-0002", "rework", reason="one more run")
    d2 = world.dispose(
        "W-0002", "accept_deviation", reason="customer concession", deviation_number="DV-7"
    )
    assert world.count("disposition") == before + 2  # a later decision is a new record
    parts, _ = world.evidence()
    assert parts["W-0002"]["disposition"]["id"] == d2.id != d1.id


def test_sign_needs_every_part_disposed_and_the_right_password(world):
    world.measure("W-0001", GOOD, DAY + timedelta(days=3, hours=2))
    world.dispose("W-0001", "accept")
    with pytest.raises(ShopdbError, match="no disposition yet for W-0002"):
        world.sign()
    world.measure("W-0002", GOOD, DAY + timedelta(days=3, hours=3))
    world.dispose("W-0002", "accept")
    events = world.count("audit_event")
    with pytest.raises(PermissionDenied, match=r"^the password is wrong; nothing was signed$"):
        world.sign(password="not-the-password")
    assert world.count("signature") == 0 and world.count("audit_event") == events
    sig = world.sign()
    assert sig.printed_name == "QA1 Person" and sig.meaning == "released"
    assert len(sig.evidence_sha256) == 64 and sig.signed_at.tzinfo is not None
    _, ev = world.evidence()
    assert ev["status"] == "released" and ev["signatures"][0]["ok"]
    with world.shop.read() as s:
        statuses = {p.serial: p.status for p in s.exec(select(m.Part))}
        audit = s.exec(select(m.AuditEvent).where(m.AuditEvent.table_name == "signature")).one()
    assert statuses["W-0001"] == statuses["W-0002"] == "released"
    assert audit.after["evidence_sha256"] == sig.evidence_sha256 and audit.actor == "qa1"
    with pytest.raises(ShopdbError, match="already released by QA1 Person"):
        world.sign(by="qa2")
    with pytest.raises(ShopdbError, match="signed and final"):
        world.dispose("W-0001", "reject", reason="late change")


def test_no_self_release_unless_the_policy_allows_it(world):
    world.measure("W-0001", GOOD, DAY + timedelta(days=3, hours=2), by="qa1")
    world.measure("W-0002", GOOD, DAY + timedelta(days=3, hours=3))
    world.dispose("W-0001", "accept")
    world.dispose("W-0002", "accept")
    with pytest.raises(PermissionDenied, match="qa1 operated or recorded the final measurement"):
        world.sign(by="qa1")
    assert (
        world.sign(by="qa1", meaning="reviewed").meaning == "reviewed"
    )  # a review is not a release
    assert world.sign(by="qa1", allow_self_release=True).meaning == "released"


def test_naming_another_operator_does_not_make_a_self_release(world):
    """QA records a measurement naming the operator `op`, then signs: the rule looks at who
    recorded it (the audit trail's authenticated actor) as well as the named operator."""
    world.measure("W-0001", GOOD, DAY + timedelta(days=3, hours=2), by="qa1", operator="op")
    world.measure("W-0002", GOOD, DAY + timedelta(days=3, hours=3))
    world.dispose("W-0001", "accept")
    world.dispose("W-0002", "accept")
    with pytest.raises(PermissionDenied, match="W-0001; another QA inspector must sign"):
        world.sign(by="qa1")
    assert world.sign(by="qa2").meaning == "released"


def test_a_lot_of_rejected_parts_is_signed_rejected(world):
    world.measure("W-0001", COMA, DAY + timedelta(days=3, hours=2))
    world.measure("W-0002", COMA, DAY + timedelta(days=3, hours=3))
    world.dispose("W-0001", "reject", reason="irregularity")
    world.dispose("W-0002", "reject", reason="irregularity")
    with pytest.raises(ShopdbError, match="no part is accepted"):
        world.sign()
    world.sign(meaning="rejected")
    _, ev = world.evidence()
    assert ev["status"] == "rejected"


def test_signed_records_are_refused_changes_in_the_service_and_the_database(world, signed):
    from shopdb.services.audit import update_record

    with world.shop.write() as s, pytest.raises(ShopdbError, match="frozen"):
        lot = s.exec(select(m.Lot)).one()
        update_record(session=s, actor="admin", row=lot, status="open")
    for sql in (
        "UPDATE lot SET status = 'open'",
        "UPDATE surface_result SET rms_nm = 0.1",
        "DELETE FROM zernike_term",
        "UPDATE signature SET meaning = 'reviewed'",
        "DELETE FROM disposition",
        "UPDATE audit_event SET actor = 'someone'",
    ):
        with (
            pytest.raises(sa.exc.DatabaseError, match=r"write-once|frozen"),
            world.shop.engine.begin() as conn,
        ):
            conn.exec_driver_sql(sql)


def _verify(world, code="L-0001"):
    with world.shop.read() as s:
        return release.verify_lot(session=s, code=code)


def test_tampering_with_signed_evidence_is_detected(world, signed, tamper):
    assert [v["ok"] for v in _verify(world)] == [True]
    with world.shop.read() as s:
        rid = s.exec(select(m.Disposition).order_by(m.Disposition.id)).first().result_id
    tamper("UPDATE surface_result SET irregularity_nm = irregularity_nm * 0.5 WHERE id = :r", r=rid)
    (v,) = _verify(world)
    assert not v["ok"] and "changed since signing" in v["problem"]
    tamper("UPDATE surface_result SET irregularity_nm = irregularity_nm * 2 WHERE id = :r", r=rid)
    assert _verify(world)[0]["ok"]  # restored exactly: the hash matches again
    tamper("UPDATE zernike_term SET coef_nm = coef_nm + 1 WHERE result_id = :r AND n = 2", r=rid)
    assert not _verify(world)[0]["ok"]


def test_a_signature_moved_to_another_lot_fails(world, signed, admin, tamper):
    with world.shop.write() as s:
        other = md.add_lot(session=s, actor=admin, code="L-0002", drawing_id=world.drawing_id)
    tamper("UPDATE signature SET lot_id = :o", o=other.id)
    (v,) = _verify(world, "L-0002")
    assert not v["ok"] and "does not belong to lot L-0002" in v["problem"]


def test_audit_deletion_reordering_and_truncation_are_named(world, signed, tamper):
    with world.shop.read() as s:
        report = verify_chain(session=s)
        ids = s.exec(select(m.AuditEvent.id).order_by(m.AuditEvent.id)).all()
    assert report.ok
    head = report.head_hash
    k = ids[len(ids) // 2]
    # reorder two: swap the contents of events k and k+1
    cols = "occurred_at, actor, action, table_name, record_id, before, after, reason"
    with world.shop.engine.connect() as conn:
        a, b = (
            conn.execute(sa.text(f"SELECT {cols} FROM audit_event WHERE id = :i"), {"i": i}).one()
            for i in (k, k + 1)
        )
    sets = ", ".join(f"{c.strip()} = :{c.strip()}" for c in cols.split(","))

    def put(i, row):
        vals = dict(row._mapping)
        for key in ("before", "after"):
            if vals[key] is not None and not isinstance(vals[key], str):
                vals[key] = json.dumps(vals[key])
        tamper(f"UPDATE audit_event SET {sets} WHERE id = :id", id=i, **vals)

    put(k, b)
    put(k + 1, a)
    with world.shop.read() as s:
        report = verify_chain(session=s)
    assert report.first_broken_id == k and "altered" in report.problem
    put(k, a)
    put(k + 1, b)
    with world.shop.read() as s:
        assert verify_chain(session=s).ok
    tamper("DELETE FROM audit_event WHERE id = :i", i=k)
    with world.shop.read() as s:
        report = verify_chain(session=s)
    assert report.first_broken_id == k + 1 and "does not follow" in report.problem
    # truncating the tail leaves a consistent chain: the exported head catches it
    tamper("DELETE FROM audit_event WHERE id >= :i", i=k)
    with world.shop.read() as s:
        assert verify_chain(session=s).ok
        report = verify_chain(session=s, expected_head=head)
    assert not report.ok and "newest events were removed" in report.problem


# Authorisation policy as the README states it (written out here, not read from the code).
POLICY = {
    "view": {"operator", "lead", "qa", "metrology", "manager", "admin"},
    "ingest": {"operator", "lead", "qa", "metrology", "admin"},
    "master_data": {"lead", "metrology", "admin"},
    "calibrate": {"metrology", "admin"},
    "release": {"qa"},
    "manage_users": {"admin"},
}


def _actions(world, actor, s):
    blobs = world.shop.blobs
    path = world.tmp / f"auth-{actor.username}.x3p"
    write_map(
        path, disk_map(GOOD, npix=48, noise_nm=0.2, rng=np.random.default_rng(len(path.name)))
    )
    return {
        "view": lambda: release.lots(session=s),
        "ingest": lambda: ingest(
            session=s,
            blobs=blobs,
            actor=actor,
            path=path,
            part_serial="W-0002",
            station_name="Bench 1",
            measured_at=DAY + timedelta(days=3, hours=1),
        ),
        "master_data": lambda: md.add_machine(session=s, actor=actor, name=f"M-{actor.username}"),
        "calibrate": lambda: md.add_calibration(
            session=s,
            actor=actor,
            reference_id=1,
            calibrated_at=DAY,
            valid_until=DAY + timedelta(days=30),
            method="three-flat",
            uncertainty_nm=1.0,
            coefficients={"2,0": 1.0},
        ),
        "release": lambda: release.dispose(
            session=s, actor=actor, code="L-0001", serial="W-0001", decision="accept"
        ),
        "manage_users": lambda: add_user(
            session=s,
            actor=actor,
            username=f"new-{actor.username}",
            display_name="New",
            role="operator",
            password="long-enough-pass",
        ),
    }


@pytest.mark.parametrize("username", ["op", "lead", "qa1", "metro", "mgr", "admin"])
def test_authorisation_matrix(world, username):
    world.measure("W-0001", GOOD, DAY + timedelta(days=3, hours=2))
    role = ROLE_USERS.get(username, "admin")
    for action, allowed in POLICY.items():
        with world.shop.write() as s:
            actor = get_user(session=s, username=username)
            call = _actions(world, actor, s)[action]
            if role in allowed:
                call()
            else:
                with pytest.raises(PermissionDenied):
                    call()
            s.rollback()  # each call is judged on the same records
    if role not in POLICY["release"]:
        with pytest.raises(PermissionDenied), world.shop.write() as s:
            release.sign(
                session=s,
                actor=get_user(session=s, username=username),
                code="L-0001",
                password=PASSWORD,
                meaning="released",
            )


def test_two_concurrent_signings_exactly_one_succeeds(world):
    world.measure("W-0001", GOOD, DAY + timedelta(days=3, hours=2))
    world.measure("W-0002", GOOD, DAY + timedelta(days=3, hours=3))
    world.dispose("W-0001", "accept")
    world.dispose("W-0002", "accept")
    barrier = threading.Barrier(2)
    outcome: dict[str, str] = {}

    def go(name):
        barrier.wait()
        try:
            world.sign(by=name)
            outcome[name] = "signed"
        except ShopdbError as exc:
            outcome[name] = str(exc)

    threads = [threading.Thread(target=go, args=(n,)) for n in ("qa1", "qa2")]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert sorted(outcome.values()).count("signed") == 1, outcome
    (loser,) = [v for v in outcome.values() if v != "signed"]
    assert "was already released by" in loser and "nothing signed" in loser
    assert world.count("signature") == 1


def test_certificate_pdf_and_html(world, signed, tamper):
    import io

    from pypdf import PdfReader

    from shopdb.services import certificate

    with world.shop.read() as s:
        data = certificate.certificate_data(
            session=s,
            blobs=world.shop.blobs,
            code="L-0001",
            shop_name="Test Shop",
        )
    text = " ".join(
        p.extract_text() for p in PdfReader(io.BytesIO(certificate.render_pdf(data))).pages
    )
    assert "Test Shop" in text and "lot L-0001" in text
    assert signed.evidence_sha256 in text.replace("\n", "")
    rows = [ln for ln in text.splitlines() if ln.startswith(("W-0001 ", "W-0002 "))]
    assert len(rows) == 2  # one table row group per part
    assert "pass" in rows[0] and "accept" in text and "reject" in text
    assert "CHANGED SINCE SIGNING" not in text
    # the decision rule, U and k of every field (ISO/IEC 17025:2017 §7.8.6 asks for the rule)
    assert "Decision rule: simple acceptance" in text and "k = 2" in text
    assert all("±" in r for r in rows)
    html = certificate.render_html(data)
    assert signed.evidence_sha256 in html and html.count("<img") == 2
    tamper("UPDATE surface_result SET pv_nm = pv_nm + 1")
    with world.shop.read() as s:
        data = certificate.certificate_data(
            session=s, blobs=world.shop.blobs, code="L-0001", shop_name="T"
        )
    text = PdfReader(io.BytesIO(certificate.render_pdf(data))).pages[0].extract_text()
    assert "CHANGED SINCE SIGNING" in text


KILL_SCRIPT = """
import sys
from shopdb.config import load_settings
from shopdb.services.session import open_shop
from shopdb.services import release
from shopdb.services.users import get_user
shop = open_shop(load_settings())
print("ready", flush=True)
sys.stdin.readline()
with shop.write() as s:
    release.sign(session=s, actor=get_user(session=s, username="qa1"), code=sys.argv[2],
                 password=sys.argv[3], meaning="released")
print("signed", flush=True)
"""


@pytest.mark.slow
def test_kill_during_signing_leaves_no_signature_without_its_evidence(world, backend, admin):
    if backend != "sqlite":
        pytest.skip("one backend is enough: the transaction boundary is the same code")
    trials = 20
    with world.shop.write() as s:
        for i in range(trials):
            lot = md.add_lot(session=s, actor=admin, code=f"K-{i}", drawing_id=world.drawing_id)
            md.add_part(
                session=s,
                actor=admin,
                serial=f"K-{i}-1",
                drawing_id=world.drawing_id,
                lot_id=lot.id,
            )
    for i in range(trials):
        world.measure(f"K-{i}-1", GOOD, DAY + timedelta(days=3, hours=2, minutes=i))
        world.dispose(f"K-{i}-1", "accept", code=f"K-{i}")
    rng = random.Random(7)
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    for i in range(trials):
        p = subprocess.Popen(
            [sys.executable, "-c", KILL_SCRIPT, "-", f"K-{i}", PASSWORD],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            text=True,
            env={
                **env,
                "SHOPDB_HOME": str(world.shop.settings.home),
                "SHOPDB_DATABASE_URL": world.shop.settings.database_url,
                "SHOPDB_BLOB_DIR": str(world.shop.settings.blob_dir),
            },
        )
        assert p.stdout.readline().strip() == "ready"
        p.stdin.write("\n")
        p.stdin.flush()
        time.sleep(rng.uniform(0.0, 0.12))  # argon2 check + the transaction take ~50-100 ms
        p.kill()
        p.communicate()  # reap it and close its pipes
    with world.shop.read() as s:
        sigs = s.exec(select(m.Signature)).all()
        events = {
            e.record_id: e
            for e in s.exec(select(m.AuditEvent).where(m.AuditEvent.table_name == "signature"))
        }
        lots = {lot.id: lot for lot in s.exec(select(m.Lot))}
        assert verify_chain(session=s).ok
        for sig in sigs:
            assert events[str(sig.id)].after["evidence_sha256"] == sig.evidence_sha256
            assert lots[sig.lot_id].status == "released"
            assert release.verify_lot(session=s, code=lots[sig.lot_id].code)[0]["ok"]
        signed_lots = {sig.lot_id for sig in sigs}
        assert all(
            (lot.status == "released") == (lot.id in signed_lots)
            for lot in lots.values()
            if lot.code.startswith("K-")
        )
    assert len(events) == len(sigs)
    print(f"{len(sigs)} of {trials} signings completed before the kill")


def test_a_drawing_with_a_malformed_callout_is_refused(shop, admin):
    with (
        pytest.raises(ShopdbError, match="expected '\\(' before the irregularity"),
        shop.write() as s,
    ):
        md.add_drawing(
            session=s,
            actor=admin,
            number="KR-9",
            revision="A",
            surface_form_callout="3/0.5 0.1; λ = 632.8 nm",
            test_wavelength_nm=632.8,
            clear_aperture_mm=50.0,
        )
    with shop.engine.connect() as conn:
        assert conn.execute(sa.text("SELECT COUNT(*) FROM drawing")).scalar() == 0


def _forge(world, tamper, *, also_the_disposition_event: bool):
    """The attack of a database user without the seal key: the rejected part's disposition
    rewritten to "accept", the signature's evidence hash and its audit event recomputed, and
    the audit chain after it re-hashed, so evidence and chain verify again."""
    from shopdb.services.audit import event_hash

    with world.shop.read() as s:
        rejected = s.exec(select(m.Disposition).where(m.Disposition.decision == "reject")).one()
    tamper("UPDATE disposition SET decision = 'accept', reason = '' WHERE id = :i", i=rejected.id)
    with world.shop.read() as s:
        sig = s.exec(select(m.Signature)).one()
        digest = release.evidence_digest(s, sig)
    tamper("UPDATE signature SET evidence_sha256 = :d", d=digest)
    with world.shop.read() as s:
        events = s.exec(select(m.AuditEvent).order_by(m.AuditEvent.id)).all()
    prev = events[0].prev_hash
    for e in events:
        after = dict(e.after or {})
        if e.table_name == "signature" and e.action == "sign":
            after["evidence_sha256"] = digest
        if (
            also_the_disposition_event
            and e.table_name == "disposition"
            and (e.record_id == str(rejected.id))
        ):
            after.update(decision="accept", reason="")
        e.after = after
        e.prev_hash, e.row_hash = prev, event_hash(prev, e)
        tamper(
            "UPDATE audit_event SET after = :a, prev_hash = :p, row_hash = :h WHERE id = :i",
            a=json.dumps(after),
            p=e.prev_hash,
            h=e.row_hash,
            i=e.id,
        )
        prev = e.row_hash
    with world.shop.read() as s:
        assert verify_chain(session=s).ok  # the chain alone no longer tells
        assert release.evidence_digest(s, s.exec(select(m.Signature)).one()) == digest


@pytest.mark.parametrize("also_the_disposition_event", [False, True])
def test_a_rewritten_signed_disposition_is_caught_by_the_seal(
    world, signed, tamper, also_the_disposition_event
):
    """HMAC-SHA256 under a key outside the database (RFC 2104): recomputing the evidence hash
    and the audit chain is not enough to forge a signed lot; the audit trail's own record of
    the rejection is also compared with the row."""
    assert [v["ok"] for v in _verify(world)] == [True]
    _forge(world, tamper, also_the_disposition_event=also_the_disposition_event)
    (v,) = _verify(world)
    assert not v["ok"] and "its seal does not match" in v["problem"]
    assert ("differs from the audit trail's record of it (reject)" in v["problem"]) is (
        not also_the_disposition_event
    )


def test_the_seal_key_stays_outside_the_database_and_old_signatures_are_sealed(
    world, signed, tamper
):
    key_file = world.shop.settings.seal_key_path
    assert key_file.stat().st_mode & 0o777 == 0o600
    key = key_file.read_text().strip()
    with world.shop.engine.connect() as conn:  # nowhere in the database
        for table in ("signature", "signature_seal", "audit_event", "shop_setting"):
            rows = conn.execute(sa.text(f"SELECT * FROM {table}")).all()
            assert key not in repr(rows)
    key_file.rename(key_file.with_suffix(".away"))
    (v,) = _verify(world)
    assert not v["ok"] and "the seal key" in v["problem"] and "is not there" in v["problem"]
    key_file.with_suffix(".away").rename(key_file)
    # a signature from before seals were kept: sealed by the upgrade when it verifies
    tamper("DELETE FROM signature_seal")
    assert "it has no seal" in _verify(world)[0]["problem"]
    with world.shop.write() as s:
        assert release.seal_verified(s) == 1
    assert _verify(world)[0]["ok"]


@pytest.mark.parametrize(
    "sql,found",
    [
        ("UPDATE user_account SET role = 'admin' WHERE username = 'qa1'", "role differs"),
        (
            "UPDATE user_account SET password_hash = 'x' || password_hash WHERE username = 'qa1'",
            "password differs",
        ),
        ("UPDATE measurement SET blob_key = :other WHERE id = 1", "blob differs"),
        ("UPDATE polishing_run SET params = '{\"pressure_kpa\": 9}'", "params differs"),
        (
            "INSERT INTO machine (name, kind, notes, created_at) "
            "VALUES ('M-quiet', 'lap', '', '2026-01-01')",
            None,
        ),
    ],
)
def test_accounts_measurements_and_runs_changed_in_the_database_are_named(
    world, signed, tamper, sql, found
):
    """A database role that may write the tables (not their triggers) promotes a user, replaces
    a password hash, points a measurement at another map or edits a run: `check` compares each
    row with what the audit trail last recorded of it (common practice: reconcile records
    against their audit trail)."""
    from shopdb.services.health import check

    assert check(shop=world.shop, verify_content=False).unrecorded_changes == []
    with world.shop.read() as s:
        other = s.exec(select(m.Measurement.blob_key).order_by(m.Measurement.id.desc())).first()
    with world.shop.write() as s:
        md.start_run(
            session=s,
            actor=get_user(session=s, username="admin"),
            part_serial="W-0001",
            machine_name=None,
            params={"pressure_kpa": 7},
        )
    assert check(shop=world.shop, verify_content=False).unrecorded_changes == []
    tamper(sql, **({"other": other} if ":other" in sql else {}))
    report = check(shop=world.shop, verify_content=False)
    if found is None:  # master data outside the guarded tables is not compared
        assert report.unrecorded_changes == []
    else:
        assert any(found in p for p in report.unrecorded_changes), report.unrecorded_changes
        assert not report.healthy
