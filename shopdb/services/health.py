"""`shopdb check`: the database and the blob store agree, every result is judged, the audit chain
is whole and every signed lot verifies."""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import sqlalchemy as sa
from sqlmodel import Session, col, select

from shopdb.models import (
    AuditEvent,
    CalloutOutcome,
    DwellPlan,
    Lot,
    Measurement,
    PolishingRun,
    ReferenceCalibration,
    RunRemoval,
    SurfaceResult,
    ToolInfluence,
    User,
)
from shopdb.services import verdict
from shopdb.services.audit import verify_chain
from shopdb.services.users import password_fingerprint

ORPHAN_GRACE_S = 600  # an ingest writes its blob just before its rows commit


@dataclass
class HealthReport:
    referenced: int = 0
    stored: int = 0
    missing: list[str] = field(default_factory=list)
    corrupt: list[str] = field(default_factory=list)
    why_corrupt: dict[str, str] = field(default_factory=dict)  # key -> the problem in words
    orphans: list[str] = field(default_factory=list)
    stray_temp_files: list[str] = field(default_factory=list)
    removed: list[str] = field(default_factory=list)
    unjudged_results: int = 0
    audit_events: int = 0
    audit_problem: str | None = None
    signed_lots: int = 0
    lot_problems: list[str] = field(default_factory=list)
    unrecorded_changes: list[str] = field(default_factory=list)

    @property
    def healthy(self) -> bool:
        return not (
            self.missing
            or self.corrupt
            or self.audit_problem
            or self.unjudged_results
            or self.lot_problems
            or self.unrecorded_changes
        ) and not (set(self.orphans) - set(self.removed))

    def as_dict(self) -> dict:
        return {**self.__dict__, "healthy": self.healthy}

    def text(self) -> str:
        lines = [f"blobs: {self.referenced} referenced, {self.stored} stored"]
        for label, keys in (
            ("missing", self.missing),
            ("corrupt", self.corrupt),
            ("orphan", self.orphans),
            ("removed", self.removed),
        ):
            lines += [
                f"{label}: {key}"
                + (f" ({self.why_corrupt[key]})" if key in self.why_corrupt else "")
                for key in keys
            ]
        lines += [f"interrupted write: {p}" for p in self.stray_temp_files]
        if self.unjudged_results:
            lines.append(
                f"{self.unjudged_results} results not judged against their drawings "
                "(run 'shopdb db upgrade')"
            )
        lines.append(f"audit chain: {self.audit_events} events, {self.audit_problem or 'intact'}")
        lines.append(f"signed lots: {self.signed_lots} checked")
        lines += [f"lot {p}" for p in self.lot_problems]
        lines += [f"changed outside shopdb: {p}" for p in self.unrecorded_changes]
        lines.append("healthy" if self.healthy else "NOT healthy")
        return "\n".join(lines)


# what the audit trail records of the accounts, measurements and runs (its keys -> columns)
_GUARDED: dict[str, tuple[Any, dict[str, str]]] = {
    "user_account": (User, {"password": "password_hash"}),
    "measurement": (Measurement, {"sha256": "source_sha256", "blob": "blob_key"}),
    "polishing_run": (PolishingRun, {}),
}
_UNGUARDED = {"failed_logins", "locked_until"}  # sign-in bookkeeping, changed unaudited


def _same(recorded, current, column: str) -> bool:
    if column == "password_hash":
        return recorded == password_fingerprint(current)
    if isinstance(current, datetime) and isinstance(recorded, str):
        try:
            recorded = datetime.fromisoformat(recorded)
        except ValueError:
            return False
        if recorded.tzinfo is None:
            recorded = recorded.replace(tzinfo=UTC)
    return recorded == current


def unrecorded_changes(session: Session) -> list[str]:
    """Accounts, measurements and polishing runs whose row differs from what the audit trail
    last recorded of it (or that it never recorded): a role, a password hash or a measurement
    edited in the database directly. Compares every field the events name."""
    problems = []
    for table, (model, aliases) in _GUARDED.items():
        recorded: dict[str, dict] = {}
        for record_id, after in session.exec(
            select(AuditEvent.record_id, AuditEvent.after)
            .where(
                AuditEvent.table_name == table,
                col(AuditEvent.action).in_(("create", "update")),
            )
            .order_by(col(AuditEvent.id))
        ):
            recorded.setdefault(record_id, {}).update(after or {})
        for row in session.exec(select(model)):
            seen = recorded.get(str(row.id))
            if seen is None:
                problems.append(f"{table} {row.id}: no audit record of its making")
                continue
            for key, value in seen.items():
                column = aliases.get(key, key)
                if column in _UNGUARDED or column not in model.model_fields:
                    continue
                if not _same(value, getattr(row, column), column):
                    problems.append(
                        f"{table} {row.id}: {key.replace('_', ' ')} differs from the audit trail"
                    )
    return problems


# every column that names a blob (a new one goes here, and its table in the locks below)
BLOB_COLUMNS: tuple[Any, ...] = (
    Measurement.blob_key,
    ReferenceCalibration.error_map_blob,
    RunRemoval.blob_key,
    ToolInfluence.blob_key,
    DwellPlan.dwell_blob,
)
_BLOB_TABLES = ", ".join(dict.fromkeys(c.class_.__tablename__ for c in BLOB_COLUMNS))


def referenced_blob_keys(session: Session) -> set[str]:
    keys: set[str] = set()
    for column in BLOB_COLUMNS:
        keys |= {k for k in session.exec(select(column)) if k}
    return keys


def unjudged(session: Session) -> int:
    """Results without a stored judgement against their drawing."""
    return session.execute(
        sa.select(sa.func.count())
        .select_from(SurfaceResult)
        .where(~sa.exists().where(col(CalloutOutcome.result_id) == col(SurfaceResult.id)))
    ).scalar_one()


def judge_unjudged(shop) -> int:
    """Judge every result stored before its judgement was kept (``shopdb db upgrade``)."""
    with shop.write() as session:
        return verdict.backfill(session, shop.blobs)


def check(
    *, shop, fix: bool = False, verify_content: bool = True, grace_s: float = ORPHAN_GRACE_S
) -> HealthReport:
    """Verify referenced blobs, list orphans, and with ``fix`` remove orphans older than
    ``grace_s``; count unjudged results; walk the audit chain; verify every signed lot."""
    from shopdb.services.release import verify_lot

    report = HealthReport()
    blobs = shop.blobs
    with shop.read() as session:
        referenced = referenced_blob_keys(session)
        report.unjudged_results = unjudged(session)
        chain = verify_chain(session=session)
        report.audit_events, report.audit_problem = chain.events, chain.problem
        signed = session.exec(select(Lot.code).where(Lot.status != "open")).all()
        report.unrecorded_changes = unrecorded_changes(session)
        report.signed_lots = len(signed)
        for code in signed:
            for sig in verify_lot(session=session, code=code):
                if not sig["ok"]:
                    report.lot_problems.append(f"{code}: signature {sig['id']}: {sig['problem']}")
    stored = set(blobs.keys())
    report.referenced, report.stored = len(referenced), len(stored)
    for key in sorted(referenced):
        problem = blobs.verify(key) if verify_content else (None if key in stored else "missing")
        if problem == "missing":
            report.missing.append(key)
        elif problem:
            report.corrupt.append(key)
            report.why_corrupt[key] = problem.replace(f"blob {key} ", "")
    report.orphans = sorted(stored - referenced)
    report.stray_temp_files = [str(p) for p in blobs.stray_temp_files()]
    if fix:
        cutoff = time.time() - grace_s
        for key in report.orphans:
            if blobs.path(key).stat().st_mtime < cutoff and _remove_orphan(shop, key):
                report.removed.append(key)
        for p in blobs.stray_temp_files():
            if p.stat().st_mtime < cutoff:
                p.unlink(missing_ok=True)
    return report


def guard_blob_references(session: Session) -> None:
    """Called by every writer before it stores a blob that a row of its transaction will
    reference: orphan removal (below) cannot then run between the blob and the row. SQLite: the
    write transaction (BEGIN IMMEDIATE) already excludes it; PostgreSQL: the lock an INSERT
    takes anyway, taken before the blob is written."""
    if session.get_bind().dialect.name == "postgresql":
        session.connection().exec_driver_sql(f"LOCK TABLE {_BLOB_TABLES} IN ROW EXCLUSIVE MODE")


def _remove_orphan(shop, key: str) -> bool:
    """Delete an orphan blob if, inside a write transaction that excludes every writer of
    blob references (see :func:`guard_blob_references`), no row references it; True if it was
    deleted."""
    with shop.write() as session:
        if session.get_bind().dialect.name == "postgresql":
            session.connection().exec_driver_sql(
                f"LOCK TABLE {_BLOB_TABLES} IN SHARE ROW EXCLUSIVE MODE"
            )
        if key in _referencing(session, key):
            return False
        shop.blobs.delete(key)
        return True


def _referencing(session: Session, key: str) -> set[str]:
    for column in BLOB_COLUMNS:
        if session.exec(select(column).where(column == key)).first():
            return {key}
    return set()
