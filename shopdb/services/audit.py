"""Append-only audit trail as a hash chain.

Each event stores ``prev_hash`` (the previous event's ``row_hash``; 64 zeros for the first)
and ``row_hash = SHA-256(prev_hash || canonical event)``, where the canonical event is the
JSON of its fields with sorted keys and no white space. ``prev_hash`` is unique, so the chain
cannot fork; on PostgreSQL an advisory lock serialises appenders, on SQLite the write
transaction (BEGIN IMMEDIATE) already does.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlmodel import Session, col, select

from shopdb.errors import ShopdbError
from shopdb.models import AuditEvent, utcnow

# records that are never changed once written (also refused by database triggers, migration 0003)
WRITE_ONCE = frozenset(
    {
        "audit_event",
        "signature",
        "disposition",
        "surface_result",
        "zernike_term",
        "callout_outcome",
        "gage_study",
        "signal_response",
        "signature_seal",
        "run_removal",
    }
)

GENESIS = "0" * 64
_PG_AUDIT_LOCK = 0x5D0B_A0D1


def canonical_json(obj: Any) -> str:
    """Deterministic JSON: sorted keys, no white space, datetimes as ISO 8601 UTC."""

    def default(o: Any) -> Any:
        if isinstance(o, datetime):
            return o.isoformat()
        raise TypeError(f"cannot serialise {type(o).__name__} in an audit record")

    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=default, allow_nan=False)


def event_hash(prev_hash: str, event: AuditEvent) -> str:
    body = canonical_json(
        {
            "occurred_at": event.occurred_at,
            "actor": event.actor,
            "action": event.action,
            "table_name": event.table_name,
            "record_id": event.record_id,
            "before": event.before,
            "after": event.after,
            "reason": event.reason,
        }
    )
    return hashlib.sha256((prev_hash + body).encode()).hexdigest()


def record_event(
    *,
    session: Session,
    actor: str,
    action: str,
    table_name: str,
    record_id: Any,
    before: dict | None = None,
    after: dict | None = None,
    reason: str = "",
) -> AuditEvent:
    """Append one event in the caller's transaction (it commits or rolls back with the change)."""
    if session.get_bind().dialect.name == "postgresql":
        session.connection().exec_driver_sql(f"SELECT pg_advisory_xact_lock({_PG_AUDIT_LOCK})")
    last = session.exec(select(AuditEvent).order_by(col(AuditEvent.id).desc()).limit(1)).first()
    prev = last.row_hash if last else GENESIS
    event = AuditEvent(
        occurred_at=utcnow(),
        actor=actor,
        action=action,
        table_name=table_name,
        record_id=str(record_id),
        before=json.loads(canonical_json(before)) if before is not None else None,
        after=json.loads(canonical_json(after)) if after is not None else None,
        reason=reason,
        prev_hash=prev,
        row_hash="",
    )
    event.row_hash = event_hash(prev, event)
    session.add(event)
    session.flush()
    return event


def snapshot(row) -> dict[str, Any]:
    """A record's fields as JSON-able values (for audit before/after)."""
    return {k: v.isoformat() if isinstance(v, datetime) else v for k, v in row.model_dump().items()}


def update_record(*, session: Session, actor: str, row, reason: str = "", view=snapshot, **changes):
    """Change fields of a quality record and audit the before/after in the same transaction.

    Write-once records and lots that have been signed are refused: a correction is a new record.
    """
    if row.__tablename__ in WRITE_ONCE:
        raise ShopdbError(
            f"{row.__tablename__} {row.id} is write-once; record a correction instead"
        )
    if row.__tablename__ == "lot" and row.status != "open":
        raise ShopdbError(f"lot {row.code} is signed {row.status}; it is frozen")
    before = view(row)
    for k, v in changes.items():
        setattr(row, k, v)
    session.add(row)
    session.flush()
    record_event(
        session=session,
        actor=actor,
        action="update",
        table_name=row.__tablename__,
        record_id=row.id,
        before=before,
        after=view(row),
        reason=reason,
    )
    return row


@dataclass(frozen=True)
class ChainReport:
    events: int
    head_hash: str
    first_broken_id: int | None
    problem: str | None

    @property
    def ok(self) -> bool:
        return self.problem is None


def verify_chain(*, session: Session, expected_head: str | None = None) -> ChainReport:
    """Walk the chain from the first event; name the first event that breaks it.

    ``expected_head`` is a ``row_hash`` exported earlier (``shopdb audit export``): it must
    still be in the chain, else events up to it were truncated or rewritten.
    """
    prev = GENESIS
    count = 0
    last_id = None
    seen_head = expected_head is None or expected_head == GENESIS
    for event in session.exec(select(AuditEvent).order_by(col(AuditEvent.id))):
        count += 1
        if event.prev_hash != prev:
            return ChainReport(
                count, prev, event.id, f"event {event.id} does not follow its predecessor"
            )
        if event_hash(prev, event) != event.row_hash:
            return ChainReport(
                count, prev, event.id, f"event {event.id} was altered after it was written"
            )
        prev = event.row_hash
        last_id = event.id
        seen_head = seen_head or prev == expected_head
    if not seen_head:
        return ChainReport(
            count,
            prev,
            last_id,
            "the exported chain head is not in the chain: newest events were removed or replaced",
        )
    return ChainReport(count, prev, None, None)


EVENT_COLUMNS = (
    "id", "occurred_at", "actor", "action", "table_name", "record_id", "reason",
    "before", "after", "prev_hash", "row_hash",
)  # fmt: skip


def events(*, session: Session) -> list[dict[str, Any]]:
    """Every audit event, oldest first, as plain values (``shopdb audit export --events``):
    before and after as canonical JSON text, so a reviewer can recompute each row hash."""
    out = []
    for e in session.exec(select(AuditEvent).order_by(col(AuditEvent.id))):
        row = {k: getattr(e, k) for k in EVENT_COLUMNS}
        row["occurred_at"] = e.occurred_at.isoformat()
        for k in ("before", "after"):
            row[k] = canonical_json(row[k]) if row[k] is not None else ""
        out.append(row)
    return out
