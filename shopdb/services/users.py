"""Users, roles, passwords (argon2id) and authorisation checks used by every service."""

from __future__ import annotations

import contextlib
from datetime import timedelta

from argon2 import PasswordHasher
from argon2.exceptions import InvalidHashError, VerificationError
from sqlmodel import Session, select

from shopdb.errors import NotFound, PermissionDenied, ShopdbError
from shopdb.models import ROLES, User, utcnow
from shopdb.services.audit import record_event, update_record

# OWASP Password Storage Cheat Sheet, argon2id minimum configuration: m = 19 MiB, t = 2, p = 1.
HASHER = PasswordHasher(time_cost=2, memory_cost=19 * 1024, parallelism=1, hash_len=32, salt_len=16)
MIN_PASSWORD_LENGTH = 12
MAX_FAILED_LOGINS = 5
LOCKOUT = timedelta(minutes=15)
_DUMMY_HASH = HASHER.hash("shopdb-timing-equaliser")

# Which roles may do what. Services call require(); the UI only hides what is refused anyway.
PERMISSIONS: dict[str, frozenset[str]] = {
    "ingest": frozenset({"operator", "lead", "qa", "metrology", "admin"}),
    "plan_runs": frozenset({"lead", "admin"}),
    "view": frozenset(ROLES),
    "release": frozenset({"qa"}),
    "calibrate": frozenset({"metrology", "admin"}),
    "manage_users": frozenset({"admin"}),
    "manage_master_data": frozenset({"admin", "lead", "metrology"}),
    "quality_policy": frozenset({"qa", "admin"}),
    "respond_to_signals": frozenset({"lead", "metrology", "admin"}),
}


def require(user: User, action: str) -> None:
    if not user.active:
        raise PermissionDenied(f"user {user.username!r} is disabled")
    if user.role not in PERMISSIONS[action]:
        raise PermissionDenied(
            f"role {user.role!r} of user {user.username!r} may not {action.replace('_', ' ')}"
        )


def _check_password(password: str) -> None:
    if len(password) < MIN_PASSWORD_LENGTH:
        raise ShopdbError(f"password is too short: at least {MIN_PASSWORD_LENGTH} characters")


def _user_view(user: User) -> dict:
    return {
        "username": user.username,
        "display_name": user.display_name,
        "role": user.role,
        "active": user.active,
    }


def get_user(*, session: Session, username: str) -> User:
    user = session.exec(select(User).where(User.username == username)).first()
    if user is None:
        raise NotFound(f"no user named {username!r}")
    return user


def any_user(*, session: Session) -> bool:
    """Whether the shop has any account yet (the first one needs no signed-in admin)."""
    return session.exec(select(User.id).limit(1)).first() is not None


def operator_account(*, session: Session, username: str) -> User:
    """The account named as the operator of a measurement: it must exist and be active, and its
    role must be one that measures."""
    user = get_user(session=session, username=username)
    if not user.active:
        raise PermissionDenied(f"operator {username!r} is disabled")
    require(user, "ingest")
    return user


def add_user(
    *,
    session: Session,
    actor: User | None,
    username: str,
    display_name: str,
    role: str,
    password: str,
) -> User:
    """Create a user. ``actor`` None is allowed only for the very first user, who must be admin."""
    if role not in ROLES:
        raise ShopdbError(f"role {role!r} is not one of {', '.join(ROLES)}")
    if (
        not username
        or len(username) > 64
        or not username.replace("-", "").replace(".", "").replace("_", "").isalnum()
    ):
        raise ShopdbError(f"user name {username!r} must be 1-64 letters, digits, '.', '-' or '_'")
    if actor is None:
        if session.exec(select(User.id).limit(1)).first() is not None:
            raise PermissionDenied("adding a user needs a signed-in admin")
        if role != "admin":
            raise ShopdbError("the first user must have the role admin")
    else:
        require(actor, "manage_users")
    if session.exec(select(User.id).where(User.username == username)).first() is not None:
        raise ShopdbError(f"user name {username!r} is taken")
    _check_password(password)
    user = User(
        username=username, display_name=display_name, role=role, password_hash=HASHER.hash(password)
    )
    session.add(user)
    session.flush()
    record_event(
        session=session,
        actor=actor.username if actor else username,
        action="create",
        table_name="user_account",
        record_id=user.id,
        after=_user_view(user),
    )
    return user


def authenticate(*, session: Session, username: str, password: str) -> User:
    """The active user with this password, or :class:`PermissionDenied`.

    After ``MAX_FAILED_LOGINS`` failures in a row the account is locked for ``LOCKOUT``.
    Call in a write session: failures are counted.
    """
    user = session.exec(select(User).where(User.username == username)).first()
    if user is None or user.password_hash is None:
        with contextlib.suppress(VerificationError):  # same time as a real check
            HASHER.verify(_DUMMY_HASH, password + "x")
        raise PermissionDenied("user name or password is wrong")
    now = utcnow()
    if user.locked_until is not None and user.locked_until > now:
        raise PermissionDenied(
            f"account {username!r} is locked after repeated failed sign-ins; try later"
        )
    try:
        HASHER.verify(user.password_hash, password)
    except (VerificationError, InvalidHashError):
        user.failed_logins += 1
        if user.failed_logins >= MAX_FAILED_LOGINS:
            user.locked_until = now + LOCKOUT
            user.failed_logins = 0
        session.add(user)
        raise PermissionDenied("user name or password is wrong") from None
    if not user.active:
        raise PermissionDenied(f"user {username!r} is disabled")
    if user.failed_logins or user.locked_until:
        user.failed_logins = 0
        user.locked_until = None
    if HASHER.check_needs_rehash(user.password_hash):
        user.password_hash = HASHER.hash(password)
    session.add(user)
    return user


def _change(session: Session, actor: User, user: User, reason: str, **changes) -> User:
    require(actor, "manage_users")
    return update_record(
        session=session, actor=actor.username, row=user, reason=reason, view=_user_view, **changes
    )


def set_role(*, session: Session, actor: User, username: str, role: str, reason: str = "") -> User:
    if role not in ROLES:
        raise ShopdbError(f"role {role!r} is not one of {', '.join(ROLES)}")
    return _change(session, actor, get_user(session=session, username=username), reason, role=role)


def disable_user(*, session: Session, actor: User, username: str, reason: str = "") -> User:
    """Accounts are disabled, never deleted: their signatures and audit events keep their name."""
    return _change(
        session, actor, get_user(session=session, username=username), reason, active=False
    )


def set_password(*, session: Session, actor: User, username: str, password: str) -> User:
    user = get_user(session=session, username=username)
    if actor.username != username:
        require(actor, "manage_users")
    _check_password(password)
    before = _user_view(user)
    user.password_hash = HASHER.hash(password)
    user.failed_logins = 0
    user.locked_until = None
    session.add(user)
    record_event(
        session=session,
        actor=actor.username,
        action="update",
        table_name="user_account",
        record_id=user.id,
        before=before,
        after={**before, "password": "changed"},
    )
    return user
