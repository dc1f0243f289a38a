"""Keyed seals of signatures: tamper evidence that rewriting the database cannot recompute.

A signature's evidence hash and the audit chain are plain SHA-256: someone who can write to the
database can change a record and recompute both. A seal is HMAC-SHA256 (RFC 2104, FIPS 198-1)
of the signature's canonical content under the shop's seal key, a 256-bit random key held in a
file outside the database (``SHOPDB_SEAL_KEY_FILE``, created 0600 at the first signature).
Whoever rewrites a signed lot without the key cannot make a matching seal; whoever holds the
key *and* the database can still forge (the README says so).

Sessions opened by :class:`shopdb.services.session.Shop` carry the key file's path in
``session.info["seal_key_file"]``.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import os
import secrets
from pathlib import Path

from sqlmodel import Session, col, select

from shopdb import models as m
from shopdb.errors import ShopdbError

KEY_BYTES = 32


def key_file(session: Session) -> Path:
    path = session.info.get("seal_key_file")
    if path is None:
        raise ShopdbError("no seal key file is configured for this session (SHOPDB_SEAL_KEY_FILE)")
    return Path(path)


def load_key(path: Path, *, create: bool = False) -> bytes | None:
    """The key in ``path`` (hex), None if there is none; with ``create`` a new random one is
    written first, readable by this account only."""
    if create and not path.exists():
        path.parent.mkdir(parents=True, exist_ok=True)
        try:
            fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        except FileExistsError:  # another process made it meanwhile
            pass
        else:
            with os.fdopen(fd, "w") as fh:
                fh.write(secrets.token_hex(KEY_BYTES) + "\n")
                fh.flush()
                os.fsync(fh.fileno())
    try:
        text = path.read_text(encoding="ascii").strip()
    except FileNotFoundError:
        return None
    except (OSError, UnicodeError) as exc:
        raise ShopdbError(f"seal key file {path}: cannot be read ({exc})") from None
    try:
        key = bytes.fromhex(text)
    except ValueError:
        key = b""
    if len(key) < 16:
        raise ShopdbError(f"seal key file {path}: not a hex key of at least 128 bits")
    return key


def key_id(key: bytes) -> str:
    return hashlib.sha256(key).hexdigest()[:16]


def _message(sig: m.Signature) -> bytes:
    body = {
        "signature": sig.id,
        "lot": sig.lot_id,
        "user": sig.user_id,
        "printed_name": sig.printed_name,
        "meaning": sig.meaning,
        "signed_at": sig.signed_at.isoformat(timespec="microseconds"),
        "evidence_sha256": sig.evidence_sha256,
        "disposition_ids": list(sig.disposition_ids),
    }
    return json.dumps(body, sort_keys=True, separators=(",", ":")).encode()


def seal(session: Session, sig: m.Signature) -> m.SignatureSeal:
    """Seal a signature just flushed (it has its id), creating the shop's key if it has none."""
    key = load_key(key_file(session), create=True)
    assert key is not None
    row = m.SignatureSeal(
        signature_id=sig.id,
        key_id=key_id(key),
        hmac_sha256=hmac.new(key, _message(sig), hashlib.sha256).hexdigest(),
    )
    session.add(row)
    return row


def problem(session: Session, sig: m.Signature) -> str | None:
    """None if the signature's seal matches under the shop's key, else the problem in words."""
    row = session.get(m.SignatureSeal, sig.id)
    if row is None:
        return "it has no seal"
    path = key_file(session)
    key = load_key(path)
    if key is None:
        return f"its seal cannot be checked: the seal key {path} is not there"
    if row.key_id != key_id(key):
        return "it was sealed with another key than this shop's"
    expected = hmac.new(key, _message(sig), hashlib.sha256).hexdigest()
    if not hmac.compare_digest(expected, row.hmac_sha256):
        return "its seal does not match: the signature was changed outside shopdb"
    return None


def seal_unsealed(session: Session, verifies) -> int:
    """Seal the signatures stored before seals were kept whose evidence still verifies
    (``verifies(sig)``); run by ``shopdb db upgrade``. Returns how many were sealed."""
    sealed = set(session.exec(select(m.SignatureSeal.signature_id)))
    n = 0
    for sig in session.exec(select(m.Signature).order_by(col(m.Signature.id))):
        if sig.id not in sealed and verifies(sig):
            seal(session, sig)
            n += 1
    return n
