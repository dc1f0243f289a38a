"""Users, roles, passwords (argon2id) and authorisation checks used by every service."""

from __future__ import annotations

import contextlib
import hashlib
import math
import threading
import time
import unicodedata
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
MAX_PASSWORD_LENGTH = 256
# Failed sign-ins slow the next attempt rather than lock the account (OWASP Authentication Cheat
# Sheet: a hard lockout lets anyone lock anyone out): after FREE_FAILURES failures in a row, each
# further attempt waits 2, 4, 8 ... seconds after the last failure, at most BACKOFF_MAX, per
# account (in the database, so every process sees it) and per client and name (in this process).
FREE_FAILURES = 3
BACKOFF_MAX = timedelta(seconds=60)
WRONG = "user name or password is wrong"
_DUMMY_HASH = HASHER.hash("shopdb-timing-equaliser")
_THROTTLE: dict[str, tuple[int, float]] = {}  # client or name -> (failures, monotonic time of last)
_THROTTLE_LOCK = threading.Lock()
# passwords too easy to guess whatever their length (a short list; the length rule does the rest)
TRIVIAL = {"password1234", "passwordpassword", "123456789012", "qwertyuiopas", "letmeinletmein"}

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
    if len(password) > MAX_PASSWORD_LENGTH:
        raise ShopdbError(f"password is too long: at most {MAX_PASSWORD_LENGTH} characters")
    if not password.strip() or len(set(password)) < 4:
        raise ShopdbError("password is too simple: use at least four different characters")
    if password.lower() in TRIVIAL:
        raise ShopdbError("password is too easy to guess (a common password)")


def check_printed_name(name: str) -> str:
    """A printed name (it goes on signatures): no control characters, no line breaks and no
    invisible formatting characters such as right-to-left overrides (Unicode category Cc/Cf)."""
    name = name.strip()
    if not name:
        raise ShopdbError("printed name is empty")
    if any(unicodedata.category(c) in ("Cc", "Cf", "Zl", "Zp") for c in name):
        raise ShopdbError(
            "printed name holds a control or invisible formatting character (e.g. a line break "
            "or a right-to-left override)"
        )
    return name


def _delay_s(failures: int) -> float:
    """Seconds the next attempt must wait after ``failures`` failures in a row."""
    if failures < FREE_FAILURES:
        return 0.0
    return min(2.0 ** (failures - FREE_FAILURES + 1), BACKOFF_MAX.total_seconds())


def _throttled(keys: list[str]) -> float:
    """Seconds still to wait for any of these throttle keys (0 if none)."""
    now = time.monotonic()
    with _THROTTLE_LOCK:
        waits = [
            _delay_s(n) - (now - last) for n, last in (_THROTTLE.get(k, (0, 0.0)) for k in keys)
        ]
    return max([0.0, *waits])


def _count_failure(keys: list[str]) -> None:
    now = time.monotonic()
    with _THROTTLE_LOCK:
        for k in keys:
            n, _ = _THROTTLE.get(k, (0, 0.0))
            _THROTTLE[k] = (n + 1, now)
        if len(_THROTTLE) > 10_000:  # forget the oldest: the map stays small
            for k, _ in sorted(_THROTTLE.items(), key=lambda kv: kv[1][1])[:5_000]:
                del _THROTTLE[k]


def _forget(keys: list[str]) -> None:
    with _THROTTLE_LOCK:
        for k in keys:
            _THROTTLE.pop(k, None)


def password_fingerprint(password_hash: str | None) -> str | None:
    """A short SHA-256 of the stored password hash: the audit trail notices a hash replaced
    outside shopdb without keeping anything a guess could be tested against."""
    return hashlib.sha256(password_hash.encode()).hexdigest()[:16] if password_hash else None


def _user_view(user: User) -> dict:
    return {
        "username": user.username,
        "display_name": user.display_name,
        "role": user.role,
        "active": user.active,
        "password": password_fingerprint(user.password_hash),
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
        or not username.isascii()  # no look-alike letters from other scripts
        or not username.replace("-", "").replace(".", "").replace("_", "").isalnum()
    ):
        raise ShopdbError(
            f"user name {username!r} must be 1-64 ASCII letters, digits, '.', '-' or '_'"
        )
    display_name = check_printed_name(display_name)
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


def authenticate(
    *, session: Session, username: str, password: str, client: str = "cli", wrong: str = WRONG
) -> User:
    """The active user with this password, or :class:`PermissionDenied` (``wrong`` its message:
    a signed-in user re-entering the password to sign is told the password is wrong).

    A wrong password, an unknown name and a disabled account get the same answer, in the same
    time. Failures are counted per account (``failed_logins``; ``locked_until`` is the earliest
    next attempt) and per client and name in this process, each with a growing delay
    (:func:`_delay_s`), and audited (``sign_in_failed``). Call in a write session of its own and
    commit it even when this raises (:func:`shopdb.services.session.authenticate_user`).
    """
    keys = [f"client:{client}", f"name:{username.lower()[:64]}"]
    wait = _throttled(keys)
    user = (
        session.exec(select(User).where(User.username == username)).first()
        if "\x00" not in username and len(username) <= 64
        else None
    )
    now = utcnow()
    if user is not None and user.locked_until is not None and user.locked_until > now:
        wait = max(wait, (user.locked_until - now).total_seconds())
    if wait > 0:
        raise PermissionDenied(f"too many failed sign-ins; try again in {math.ceil(wait)} s")
    ok = False
    if user is None or user.password_hash is None:
        with contextlib.suppress(VerificationError):  # same time as a real check
            HASHER.verify(_DUMMY_HASH, password + "x")
    else:
        try:
            ok = HASHER.verify(user.password_hash, password)
        except (VerificationError, InvalidHashError):
            ok = False
    if not ok or user is None or not user.active:
        _count_failure(keys)
        failures = 0
        if user is not None:
            user.failed_logins += 1
            failures = user.failed_logins
            delay = _delay_s(failures)
            user.locked_until = now + timedelta(seconds=delay) if delay else None
            session.add(user)
        record_event(
            session=session,
            actor=(username if user is not None else "(unknown user)")[:64],
            action="sign_in_failed",
            table_name="user_account",
            record_id=user.id if user is not None else "-",
            after={
                "client": client[:64],
                "failures_in_a_row": failures,
                **(
                    {}
                    if user is not None
                    else {"name_tried": username[:64].replace("\x00", "\ufffd")}
                ),
                **({"account": "disabled"} if user is not None and not user.active else {}),
            },
        )
        raise PermissionDenied(wrong)
    _forget(keys)
    if user.failed_logins or user.locked_until:
        user.failed_logins = 0
        user.locked_until = None
    if HASHER.check_needs_rehash(user.password_hash):
        before = _user_view(user)
        user.password_hash = HASHER.hash(password)
        record_event(
            session=session,
            actor=user.username,
            action="update",
            table_name="user_account",
            record_id=user.id,
            before=before,
            after=_user_view(user),
            reason="password re-hashed with the current parameters at sign-in",
        )
    session.add(user)
    return user


def _change(session: Session, actor: User, user: User, reason: str, **changes) -> User:
    require(actor, "manage_users")
    stays_admin = changes.get("role", user.role) == "admin" and changes.get("active", user.active)
    if user.role == "admin" and user.active and not stays_admin:
        others = session.exec(
            select(User.id).where(User.role == "admin", User.active, User.id != user.id)
        ).first()
        if others is None:
            raise ShopdbError(f"{user.username} is the last active admin: make another admin first")
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
        after=_user_view(user),
    )
    return user
