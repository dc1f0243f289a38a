"""Users (argon2id), roles, and the audit hash chain."""

from __future__ import annotations

import itertools
from datetime import timedelta

import pytest
import sqlalchemy as sa
from argon2 import extract_parameters
from argon2.low_level import Type
from sqlmodel import select

from shopdb.errors import PermissionDenied, ShopdbError
from shopdb.models import AuditEvent, User
from shopdb.services import users
from shopdb.services.audit import GENESIS, record_event, verify_chain


def test_password_hash_is_argon2id_with_owasp_parameters(shop, admin):
    """OWASP Password Storage Cheat Sheet: argon2id, m = 19 MiB, t = 2, p = 1."""
    params = extract_parameters(admin.password_hash)
    assert params.type is Type.ID
    assert (params.memory_cost, params.time_cost, params.parallelism) == (19456, 2, 1)


def test_first_user_must_be_admin_and_later_users_need_an_admin(shop, admin):
    with shop.write() as session, pytest.raises(PermissionDenied, match="signed-in admin"):
        users.add_user(
            session=session,
            actor=None,
            username="x",
            display_name="X",
            role="qa",
            password="long-enough-pass",
        )
    with shop.write() as session:
        qa = users.add_user(
            session=session,
            actor=admin,
            username="qa1",
            display_name="Q",
            role="qa",
            password="long-enough-pass",
        )
    with shop.write() as session, pytest.raises(PermissionDenied, match="may not manage users"):
        users.add_user(
            session=session,
            actor=qa,
            username="y",
            display_name="Y",
            role="qa",
            password="long-enough-pass",
        )


@pytest.mark.parametrize(
    "kw,message",
    [
        ({"password": "short"}, "too short: at least 12"),
        ({"role": "boss"}, "role 'boss' is not one of"),
        ({"username": "bad name!"}, "must be 1-64 ASCII letters"),
        ({"username": "аdmin2"}, "must be 1-64 ASCII letters"),  # a Cyrillic a
        ({"display_name": "Eve\u202eresU"}, "invisible formatting"),  # right-to-left override
        ({"display_name": "Two\nLines"}, "control or invisible"),
        ({"password": " " * 12}, "too simple"),
        ({"password": "a" * 12}, "too simple"),
        ({"password": "x" * 10_000_000}, "too long"),
        ({"password": "Password1234"}, "too easy to guess"),
        ({"username": "admin"}, "is taken"),
    ],
)
def test_bad_user_input(shop, admin, kw, message):
    args = {
        "username": "new",
        "display_name": "N",
        "role": "qa",
        "password": "long-enough-pass",
        **kw,
    }
    with shop.write() as session, pytest.raises(ShopdbError, match=message):
        users.add_user(session=session, actor=admin, **args)


def test_failed_sign_ins_slow_down_are_audited_and_all_answer_alike(shop, admin, monkeypatch):
    """OWASP Authentication Cheat Sheet (common practice): failures are counted in the database
    and slow the next attempt (2, 4, 8 ... s, at most 60 s) instead of locking the account for
    anyone who guesses five times; a wrong password, an unknown name and a disabled account give
    one answer; every failure is an audit event."""
    from shopdb.services.session import authenticate_user

    clock = {"now": users.utcnow(), "mono": 1000.0}
    monkeypatch.setattr(users, "utcnow", lambda: clock["now"])
    monkeypatch.setattr(users.time, "monotonic", lambda: clock["mono"])

    def wait(seconds):
        clock["now"] += timedelta(seconds=seconds)
        clock["mono"] += seconds

    assert authenticate_user(shop, "admin", "admin-password-1").id
    for _ in range(users.FREE_FAILURES):
        with pytest.raises(PermissionDenied, match=r"^user name or password is wrong$"):
            authenticate_user(shop, "admin", "nope-nope-nope")
    with pytest.raises(PermissionDenied, match=r"try again in 2 s"):  # even the right password
        authenticate_user(shop, "admin", "admin-password-1")
    wait(2)
    with pytest.raises(PermissionDenied, match="wrong"):
        authenticate_user(shop, "admin", "nope-nope-nope")
    with pytest.raises(PermissionDenied, match=r"try again in 4 s"):
        authenticate_user(shop, "admin", "admin-password-1")
    for _ in range(10):  # a determined guesser never holds the account longer than 60 s
        wait(60)
        with pytest.raises(PermissionDenied, match="wrong"):
            authenticate_user(shop, "admin", "nope-nope-nope")
    with pytest.raises(PermissionDenied, match=r"try again in 60 s"):
        authenticate_user(shop, "admin", "admin-password-1")
    wait(60)
    assert authenticate_user(shop, "admin", "admin-password-1").failed_logins == 0
    with shop.write() as session:
        users.add_user(
            session=session,
            actor=admin,
            username="qa1",
            display_name="Q",
            role="qa",
            password="long-enough-pass",
        )
        users.disable_user(session=session, actor=admin, username="qa1", reason="left the company")
    for name, password in (("qa1", "long-enough-pass"), ("nobody", "long-enough-pass")):
        with pytest.raises(PermissionDenied, match=r"^user name or password is wrong$"):
            authenticate_user(shop, name, password, client="app:10.0.0.9")
    with shop.read() as session:
        failed = session.exec(select(AuditEvent).where(AuditEvent.action == "sign_in_failed")).all()
        assert session.exec(select(User).where(User.username == "qa1")).one().active is False
    assert len(failed) == users.FREE_FAILURES + 1 + 10 + 2
    assert failed[-1].after["name_tried"] == "nobody"
    assert failed[-2].after == {
        "client": "app:10.0.0.9",
        "failures_in_a_row": 1,
        "account": "disabled",
    }


def test_one_client_guessing_many_names_is_slowed_too(shop, admin):
    """The in-process throttle per client (the app's browser address) and per name: a client
    that fails on many names waits, however many names it tries."""
    from shopdb.services.session import authenticate_user

    for i in range(users.FREE_FAILURES):
        with pytest.raises(PermissionDenied, match="wrong"):
            authenticate_user(shop, f"name{i}", "whatever-password", client="app:10.0.0.7")
    with pytest.raises(PermissionDenied, match="try again"):
        authenticate_user(shop, "admin", "admin-password-1", client="app:10.0.0.7")
    assert authenticate_user(shop, "admin", "admin-password-1", client="app:10.0.0.8").id


def test_the_last_admin_cannot_demote_or_disable_itself(shop, admin):
    with pytest.raises(ShopdbError, match="last active admin"), shop.write() as session:
        users.set_role(session=session, actor=admin, username="admin", role="qa")
    with pytest.raises(ShopdbError, match="last active admin"), shop.write() as session:
        users.disable_user(session=session, actor=admin, username="admin")
    with shop.write() as session:
        users.add_user(
            session=session,
            actor=admin,
            username="admin2",
            display_name="Second Admin",
            role="admin",
            password="second-admin-pw",
        )
        users.set_role(session=session, actor=admin, username="admin", role="qa", reason="moved")


def test_audit_chain_links_and_detects_tampering(shop, admin, tamper):
    with shop.write() as session:
        for i in range(3):
            record_event(
                session=session,
                actor="admin",
                action="update",
                table_name="machine",
                record_id=i,
                before={"a": i},
                after={"a": i + 1},
                reason="test",
            )
    with shop.read() as session:
        events = session.exec(select(AuditEvent).order_by(AuditEvent.id)).all()
        assert events[0].prev_hash == GENESIS
        assert all(b.prev_hash == a.row_hash for a, b in itertools.pairwise(events))
        report = verify_chain(session=session)
        assert report.ok and report.events == 4  # the admin's creation + 3
        head = report.head_hash
    # the database itself refuses changes and deletions of audit rows
    for change in (
        lambda s: s.add(_with(s.get(AuditEvent, events[2].id), after={"a": 99})),
        lambda s: s.delete(s.get(AuditEvent, events[-1].id)),
    ):
        with pytest.raises(sa.exc.DatabaseError, match="write-once"), shop.write() as session:
            change(session)
            session.flush()
    # past the triggers (direct file or superuser access), the chain still tells
    tamper("UPDATE audit_event SET reason = 'edited' WHERE id = :id", id=events[2].id)
    with shop.read() as session:
        report = verify_chain(session=session)
    assert report.first_broken_id == events[2].id and "altered" in report.problem
    tamper("UPDATE audit_event SET reason = 'test' WHERE id = :id", id=events[2].id)
    tamper("DELETE FROM audit_event WHERE id = :id", id=events[-1].id)
    with shop.read() as session:
        assert verify_chain(session=session).ok  # the tail was cut: only the exported head tells
        report = verify_chain(session=session, expected_head=head)
    assert not report.ok and "exported chain head" in report.problem


def _with(row, **changes):
    for k, v in changes.items():
        setattr(row, k, v)
    return row


def test_a_disabled_or_non_measuring_account_is_refused_as_operator(shop, admin):
    with shop.write() as session:
        for name, role in (("pim", "operator"), ("mgr", "manager")):
            users.add_user(
                session=session,
                actor=admin,
                username=name,
                display_name=name.title(),
                role=role,
                password="long-enough-pass",
            )
        users.disable_user(session=session, actor=admin, username="pim", reason="left")
    with shop.read() as session:
        with pytest.raises(PermissionDenied, match="operator 'pim' is disabled"):
            users.operator_account(session=session, username="pim")
        with pytest.raises(PermissionDenied, match="may not ingest"):
            users.operator_account(session=session, username="mgr")
