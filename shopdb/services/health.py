"""`shopdb check`: the database and the blob store agree, and the audit chain is whole."""

from __future__ import annotations

import time
from dataclasses import dataclass, field

from sqlmodel import Session, select

from shopdb.blobs import BlobStore
from shopdb.models import Measurement, ReferenceCalibration
from shopdb.services.audit import verify_chain

ORPHAN_GRACE_S = 600  # an ingest writes its blob just before its rows commit


@dataclass
class HealthReport:
    referenced: int = 0
    stored: int = 0
    missing: list[str] = field(default_factory=list)
    corrupt: list[str] = field(default_factory=list)
    orphans: list[str] = field(default_factory=list)
    stray_temp_files: list[str] = field(default_factory=list)
    removed: list[str] = field(default_factory=list)
    audit_events: int = 0
    audit_problem: str | None = None

    @property
    def healthy(self) -> bool:
        return not (self.missing or self.corrupt or self.audit_problem) and not (
            set(self.orphans) - set(self.removed)
        )

    def as_dict(self) -> dict:
        return {**self.__dict__, "healthy": self.healthy}


def referenced_blob_keys(session: Session) -> set[str]:
    keys = set(session.exec(select(Measurement.blob_key)))
    keys |= {k for k in session.exec(select(ReferenceCalibration.error_map_blob)) if k}
    return keys


def check(
    *,
    session: Session,
    blobs: BlobStore,
    fix: bool = False,
    verify_content: bool = True,
    grace_s: float = ORPHAN_GRACE_S,
) -> HealthReport:
    """Verify referenced blobs, list orphans, and with ``fix`` remove orphans older than ``grace_s``."""
    report = HealthReport()
    referenced = referenced_blob_keys(session)
    stored = set(blobs.keys())
    report.referenced, report.stored = len(referenced), len(stored)
    for key in sorted(referenced):
        problem = blobs.verify(key) if verify_content else (None if key in stored else "missing")
        if problem == "missing":
            report.missing.append(key)
        elif problem:
            report.corrupt.append(key)
    report.orphans = sorted(stored - referenced)
    report.stray_temp_files = [str(p) for p in blobs.stray_temp_files()]
    if fix:
        cutoff = time.time() - grace_s
        for key in report.orphans:
            if blobs.path(key).stat().st_mtime < cutoff:
                blobs.delete(key)
                report.removed.append(key)
        for p in blobs.stray_temp_files():
            if p.stat().st_mtime < cutoff:
                p.unlink(missing_ok=True)
    chain = verify_chain(session=session)
    report.audit_events = chain.events
    report.audit_problem = chain.problem
    return report
