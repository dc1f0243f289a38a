"""Users (argon2id), roles, and the audit hash chain."""

from __future__ import annotations

import itertools

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
        ({"username": "bad name!"}, "must be 1-64 letters"),
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


def test_authenticate_wrong_password_lockout_and_disable(shop, admin):
    with shop.write() as session:
        assert users.authenticate(session=session, username="admin", password="admin-password-1").id
    for _ in range(users.MAX_FAILED_LOGINS):
        with shop.write() as session:
            with pytest.raises(PermissionDenied, match="wrong"):
                users.authenticate(session=session, username="admin", password="nope-nope-nope")
            session.commit()
    with shop.write() as session, pytest.raises(PermissionDenied, match="locked"):
        users.authenticate(session=session, username="admin", password="admin-password-1")
    with shop.write() as session:
        qa = users.add_user(
            session=session,
            actor=admin,
            username="qa1",
            display_name="Q",
            role="qa",
            password="long-enough-pass",
        )
        users.disable_user(session=session, actor=admin, username="qa1", reason="left the company")
    with shop.write() as session, pytest.raises(PermissionDenied, match="disabled"):
        users.authenticate(session=session, username="qa1", password="long-enough-pass")
    with shop.read() as session:
        assert session.exec(select(User).where(User.username == "qa1")).one().active is False
    assert qa.id


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
