"""Lot release: per-part evidence and verdicts, QA dispositions, electronic signatures.

The verdict of each part is the verdict owner's (:mod:`shopdb.services.verdict`): its final
measurement (the latest valid one after its last polishing run started, or one QA designates)
against every field of the drawing's callout, with the blockers. A disposition stores the
verdict QA saw (write-once; a later one supersedes it).

A signature lists the dispositions it signs; its ``evidence_sha256`` is the SHA-256 of the
canonical JSON (sorted keys, no white space) of the signed records as they are in the database —
lot, drawing, each part, its disposition, measurement, result with its Zernike terms and
reference calibration — together with the signature's own lot, signer, printed name, meaning and
time. Verification recomputes it: an edit to any of those records, or a signature moved to another
lot, no longer matches.
"""

from __future__ import annotations

import hashlib
from datetime import datetime

import sqlalchemy as sa
from sqlmodel import Session, col, select

from shopdb import models as m
from shopdb.errors import NotFound, PermissionDenied, ShopdbError
from shopdb.models import utcnow
from shopdb.services import seal, verdict
from shopdb.services.audit import canonical_json, record_event, snapshot, update_record
from shopdb.services.lookups import drawing_callout, get_by
from shopdb.services.masterdata import create_audited
from shopdb.services.users import authenticate, require
from shopdb.spc.decision import DecisionRule

WRONG_PASSWORD = "the password is wrong; nothing was signed"
DECISION_FOR_STATUS = {
    "accept": "released",
    "accept_deviation": "released",
    "reject": "rejected",
    "rework": "rework",
}


def _iso(t: datetime | None) -> str | None:
    return t.isoformat() if t else None


def _current_dispositions(session: Session, lot_id: int) -> dict[int, m.Disposition]:
    """part id -> its latest disposition in the lot."""
    rows = session.exec(
        select(m.Disposition).where(m.Disposition.lot_id == lot_id).order_by(col(m.Disposition.id))
    ).all()
    return {d.part_id: d for d in rows}


def _disposition_view(d: m.Disposition, session: Session) -> dict:
    by = session.get(m.User, d.decided_by_id)
    return {
        "id": d.id,
        "decision": d.decision,
        "deviation_number": d.deviation_number,
        "reason": d.reason,
        "decided_by": by.display_name,
        "decided_at": _iso(d.decided_at),
        "verdict": d.verdict.get("verdict"),
    }


def lot_evidence(*, session: Session, code: str) -> dict:
    """Everything QA needs on one screen: per part evidence, verdict and current disposition,
    the lot's signatures and whether they still verify (viewing is every role's right)."""
    lot = get_by(session, m.Lot, "code", code, "lot")
    drawing, callout = drawing_callout(session, lot.drawing_id)
    current = _current_dispositions(session, lot.id)
    parts = []
    charts: dict = {}
    for part in session.exec(
        select(m.Part).where(m.Part.lot_id == lot.id).order_by(col(m.Part.serial))
    ):
        d = current.get(part.id)
        if d is not None and lot.status != "open":
            v = verdict.Verdict.from_dict(d.verdict)  # a signed lot shows what was signed
        else:
            designated = (
                d.verdict.get("measurement_id") if d and d.verdict.get("designated") else None
            )
            v = verdict.part_verdict(session, part, measurement_id=designated, charts=charts)
        ev = v.as_dict()
        ev["disposition"] = _disposition_view(d, session) if d else None
        parts.append(ev)
    return {
        "lot": lot.code,
        "lot_id": lot.id,
        "status": lot.status,
        "drawing": f"{drawing.number} rev {drawing.revision}",
        "drawing_title": drawing.title,
        "callout": drawing.surface_form_callout,
        "decision_rule": drawing.decision_rule,
        "decision_rule_text": DecisionRule.parse(drawing.decision_rule).describe(),
        "wavelength_nm": callout.wavelength_nm,
        "clear_aperture_mm": drawing.clear_aperture_mm,
        "parts": parts,
        "signatures": verify_lot(session=session, code=code),
    }


def lots(*, session: Session, include_signed: bool = False) -> list[dict]:
    """Lots awaiting release (open) — or all lots — with part counts and how many are disposed."""
    parts = (
        sa.select(col(m.Part.lot_id), sa.func.count().label("n"))
        .group_by(col(m.Part.lot_id))
        .subquery()
    )
    disposed = (
        sa.select(
            col(m.Disposition.lot_id),
            sa.func.count(sa.distinct(col(m.Disposition.part_id))).label("n"),
        )
        .group_by(col(m.Disposition.lot_id))
        .subquery()
    )
    q = (
        sa.select(
            col(m.Lot.code),
            col(m.Lot.status),
            col(m.Drawing.number),
            sa.func.coalesce(parts.c.n, 0),
            sa.func.coalesce(disposed.c.n, 0),
        )
        .join(m.Drawing, col(m.Drawing.id) == m.Lot.drawing_id)
        .outerjoin(parts, parts.c.lot_id == m.Lot.id)
        .outerjoin(disposed, disposed.c.lot_id == m.Lot.id)
        .order_by(col(m.Lot.code))
    )
    if not include_signed:
        q = q.where(col(m.Lot.status) == "open")
    return [
        {"lot": c, "status": st, "drawing": d, "parts": int(n), "disposed": int(k)}
        for c, st, d, n, k in session.execute(q).all()
    ]


# --- dispositions -------------------------------------------------------------------------


def dispose(
    *,
    session: Session,
    actor: m.User,
    code: str,
    serial: str,
    decision: str,
    reason: str = "",
    deviation_number: str | None = None,
    measurement_id: int | None = None,
) -> m.Disposition:
    """QA's decision on one part of an open lot; supersedes any earlier decision on it."""
    require(actor, "release")
    if decision not in m.DECISIONS:
        raise ShopdbError(f"decision {decision!r} is not one of {', '.join(m.DECISIONS)}")
    lot = get_by(session, m.Lot, "code", code, "lot")
    if lot.status != "open":
        raise ShopdbError(f"lot {code} is {lot.status}; its dispositions are signed and final")
    part = get_by(session, m.Part, "serial", serial, "part serial")
    if part.lot_id != lot.id:
        raise ShopdbError(f"part {serial} is not in lot {code}")
    reason = reason.strip()
    v = verdict.part_verdict(session, part, measurement_id=measurement_id)
    if decision == "accept" and v.verdict != "pass":
        raise ShopdbError(
            f"part {serial} cannot be accepted: verdict {v.verdict} ({'; '.join(v.reasons)}); "
            "accept with a deviation, rework or reject it"
        )
    if decision == "accept_deviation" and not (deviation_number and reason):
        raise ShopdbError("accept with deviation needs a deviation number and a reason")
    if decision in ("reject", "rework") and not reason:
        raise ShopdbError(f"decision {decision} needs a reason")
    if measurement_id is not None and not reason:
        raise ShopdbError("designating a measurement other than the final one needs a reason")
    d = m.Disposition(
        lot_id=lot.id,
        part_id=part.id,
        result_id=v.result_id,
        decision=decision,
        deviation_number=deviation_number or None,
        reason=reason,
        decided_by_id=actor.id,
        verdict=v.as_dict(),
    )
    create_audited(session, actor, d, action="release", reason=reason)
    return d


def accept_passing(
    *, session: Session, actor: m.User, code: str
) -> tuple[list[str], list[tuple[str, str]]]:
    """Accept every part of an open lot that passes and has no disposition yet, in one
    transaction. Returns (accepted serials, [(serial, why not) for the other undecided parts])."""
    require(actor, "release")
    lot = get_by(session, m.Lot, "code", code, "lot")
    if lot.status != "open":
        raise ShopdbError(f"lot {code} is {lot.status}; its dispositions are signed and final")
    current = _current_dispositions(session, lot.id)
    done: list[str] = []
    left: list[tuple[str, str]] = []
    charts: dict = {}
    for part in session.exec(
        select(m.Part).where(m.Part.lot_id == lot.id).order_by(col(m.Part.serial))
    ):
        if part.id in current:
            continue
        v = verdict.part_verdict(session, part, charts=charts)
        if v.verdict != "pass":
            left.append((part.serial, f"{v.verdict}: {'; '.join(v.reasons)}"))
            continue
        dispose(session=session, actor=actor, code=code, serial=part.serial, decision="accept")
        done.append(part.serial)
    return done, left


# --- signatures ---------------------------------------------------------------------------


def _identity(row, name: str) -> dict | None:
    """What identifies a lot or part (its status moves on at signing, so it is not evidence)."""
    if row is None:
        return None
    return {"id": row.id, name: getattr(row, name), "drawing_id": row.drawing_id} | (
        {"lot_id": row.lot_id} if hasattr(row, "lot_id") else {}
    )


def _signed_records(session: Session, lot_id: int, disposition_ids: list[int]) -> dict:
    """The records a signature covers, as they are now in the database."""
    lot = session.get(m.Lot, lot_id)
    records: dict = {"lot": _identity(lot, "code"), "parts": []}
    if lot is not None:
        records["drawing"] = snapshot(session.get(m.Drawing, lot.drawing_id))
    for did in disposition_ids:
        d = session.get(m.Disposition, did)
        item: dict = {"disposition_id": did, "disposition": snapshot(d) if d else None}
        if d is not None:
            item["part"] = _identity(session.get(m.Part, d.part_id), "serial")
            if d.result_id is not None:
                res = session.get(m.SurfaceResult, d.result_id)
                item["result"] = snapshot(res)
                item["zernike"] = [
                    [t.n, t.m, t.coef_nm]
                    for t in session.exec(
                        select(m.ZernikeTerm)
                        .where(m.ZernikeTerm.result_id == d.result_id)
                        .order_by(col(m.ZernikeTerm.n), col(m.ZernikeTerm.m))
                    )
                ]
                me = session.get(m.Measurement, res.measurement_id)
                item["measurement"] = snapshot(me)
                if me.reference_calibration_id is not None:
                    item["calibration"] = snapshot(
                        session.get(m.ReferenceCalibration, me.reference_calibration_id)
                    )
        records["parts"].append(item)
    return records


def _recorded_by(session: Session, measurement_id: int | None) -> str | None:
    """Who recorded a measurement: the authenticated actor of its creation in the audit trail
    (the operator field only names who the recorder said measured it)."""
    if measurement_id is None:
        return None
    return session.exec(
        select(m.AuditEvent.actor).where(
            m.AuditEvent.table_name == "measurement",
            m.AuditEvent.action == "create",
            m.AuditEvent.record_id == str(measurement_id),
        )
    ).first()


def evidence_digest(session: Session, sig: m.Signature) -> str:
    """SHA-256 of the canonical serialisation of what ``sig`` signs (see the module notes)."""
    body = {
        "signature": {
            "lot_id": sig.lot_id,
            "user_id": sig.user_id,
            "printed_name": sig.printed_name,
            "meaning": sig.meaning,
            "signed_at": _iso(sig.signed_at),
            "disposition_ids": list(sig.disposition_ids),
        },
        "records": _signed_records(session, sig.lot_id, list(sig.disposition_ids)),
    }
    return hashlib.sha256(canonical_json(body).encode()).hexdigest()


def sign(
    *,
    session: Session,
    actor: m.User,
    code: str,
    password: str,
    meaning: str,
    allow_self_release: bool = False,
) -> m.Signature:
    """Sign a lot: re-enter the password, check the sequencing rules, freeze the evidence.

    ``released`` needs every part disposed and at least one accepted; ``rejected`` rejects the
    lot; ``reviewed`` records a review and leaves the lot open. The lot row is locked for the
    transaction, so of two concurrent final signatures exactly one succeeds.
    """
    if meaning not in m.SIGNATURE_MEANINGS:
        raise ShopdbError(f"meaning {meaning!r} is not one of {', '.join(m.SIGNATURE_MEANINGS)}")
    require(actor, "release")
    # the signing user must prove identity now (21 CFR 11.200(a)): a failure is counted
    signer = authenticate(
        session=session, username=actor.username, password=password, wrong=WRONG_PASSWORD
    )
    lot = session.exec(select(m.Lot).where(m.Lot.code == code).with_for_update()).first()
    if lot is None:
        raise NotFound(f"unknown lot {code!r}")
    if lot.status != "open":
        last = session.exec(
            select(m.Signature)
            .where(m.Signature.lot_id == lot.id)
            .order_by(col(m.Signature.id).desc())
        ).first()
        by = f" by {last.printed_name} at {last.signed_at:%Y-%m-%d %H:%M} UTC" if last else ""
        raise ShopdbError(f"lot {code} was already {lot.status}{by}; nothing signed")
    parts = session.exec(
        select(m.Part).where(m.Part.lot_id == lot.id).order_by(col(m.Part.id))
    ).all()
    if not parts:
        raise ShopdbError(f"lot {code} has no parts to sign for")
    current = _current_dispositions(session, lot.id)
    missing = [p.serial for p in parts if p.id not in current]
    if missing:
        raise ShopdbError(
            f"lot {code}: no disposition yet for {', '.join(missing)}; dispose every part first"
        )
    decisions = [current[p.id].decision for p in parts]
    if meaning == "released" and not any(d.startswith("accept") for d in decisions):
        raise ShopdbError(f"lot {code}: no part is accepted; sign it as rejected instead")
    if not allow_self_release and meaning != "reviewed":
        own = [
            p.serial
            for p in parts
            if current[p.id].verdict.get("operator_id") == signer.id
            or _recorded_by(session, current[p.id].verdict.get("measurement_id")) == signer.username
        ]
        if own:
            raise PermissionDenied(
                f"{signer.username} operated or recorded the final measurement of "
                f"{', '.join(own)}; another QA inspector must sign (shop policy: no self-release)"
            )
    sig = m.Signature(
        lot_id=lot.id,
        user_id=signer.id,
        printed_name=signer.display_name,
        meaning=meaning,
        evidence_sha256="",
        disposition_ids=[current[p.id].id for p in parts],
        signed_at=utcnow(),  # server time; microseconds survive the round trip on both backends
    )
    # hashed before the insert: signatures are write-once
    sig.evidence_sha256 = evidence_digest(session, sig)
    session.add(sig)
    session.flush()
    seal.seal(session, sig)
    record_event(
        session=session,
        actor=signer.username,
        action="sign",
        table_name="signature",
        record_id=sig.id,
        after={
            "lot": code,
            "meaning": meaning,
            "printed_name": sig.printed_name,
            "signed_at": _iso(sig.signed_at),
            "evidence_sha256": sig.evidence_sha256,
            "disposition_ids": sig.disposition_ids,
        },
    )
    if meaning != "reviewed":
        for p in parts:
            status = (
                DECISION_FOR_STATUS[current[p.id].decision] if meaning == "released" else "rejected"
            )
            if p.status != "scrapped" and status != p.status:  # a scrapped part stays scrapped
                update_record(
                    session=session,
                    actor=signer.username,
                    row=p,
                    reason=f"lot {code} signed {meaning}",
                    status=status,
                )
        update_record(
            session=session,
            actor=signer.username,
            row=lot,
            reason=f"signed {meaning} by {sig.printed_name}",
            status=meaning,
        )
    return sig


def sign_lot(*, shop, actor: m.User, code: str, password: str, meaning: str) -> m.Signature:
    """:func:`sign` in its own transaction with the shop's self-release policy; a wrong password
    is counted (in a transaction of its own) and nothing is signed."""
    from shopdb.services.session import authenticate_user

    authenticate_user(shop, actor.username, password, wrong=WRONG_PASSWORD)  # counts, raises
    with shop.write() as session:
        return sign(
            session=session,
            actor=actor,
            code=code,
            password=password,
            meaning=meaning,
            allow_self_release=shop.settings.allow_self_release,
        )


_CREATED = ("decision", "part_id", "result_id", "deviation_number")


def _against_the_audit_trail(session: Session, sig: m.Signature, signed: dict) -> list[str]:
    """The signature and the dispositions it signs, as the audit trail recorded them when they
    were made: a row rewritten afterwards (with its hashes recomputed) no longer matches the
    event that created it."""

    def event(table: str, record_id, action: str):
        return session.exec(
            select(m.AuditEvent.after).where(
                m.AuditEvent.table_name == table,
                m.AuditEvent.record_id == str(record_id),
                m.AuditEvent.action == action,
            )
        ).first()

    problems = []
    made = event("signature", sig.id, "sign")
    if made is None or (made.get("evidence_sha256"), made.get("meaning")) != (
        sig.evidence_sha256,
        sig.meaning,
    ):
        problems.append("the signature differs from the audit trail's record of its signing")
    for did, d in signed.items():
        if d is None:
            continue
        made = event("disposition", did, "create")
        if made is None or any(made.get(k) != getattr(d, k) for k in _CREATED):
            problems.append(
                f"disposition {did} ({d.decision}) differs from the audit trail's record of it"
                + (f" ({made.get('decision')})" if made else "")
            )
    return problems


def verify_lot(*, session: Session, code: str) -> list[dict]:
    """Each signature of the lot with ``ok`` and, if it fails, the problem in plain words."""
    lot = get_by(session, m.Lot, "code", code, "lot")
    now_parts = set(session.exec(select(m.Part.id).where(m.Part.lot_id == lot.id)).all())
    out = []
    for sig in session.exec(
        select(m.Signature).where(m.Signature.lot_id == lot.id).order_by(col(m.Signature.id))
    ):
        problems = []
        if evidence_digest(session, sig) != sig.evidence_sha256:
            problems.append("the signed records changed since signing")
        signed = {did: session.get(m.Disposition, did) for did in sig.disposition_ids}
        for did, d in signed.items():
            if d is None or d.lot_id != lot.id:
                problems.append(f"disposition {did} does not belong to lot {code}")
        if now_parts != {d.part_id for d in signed.values() if d is not None}:
            problems.append("the lot's parts are not the parts that were signed for")
        problems += _against_the_audit_trail(session, sig, signed)
        sealed = seal.problem(session, sig)
        if sealed:
            problems.append(sealed)
        out.append(
            {
                "id": sig.id,
                "printed_name": sig.printed_name,
                "meaning": sig.meaning,
                "signed_at": _iso(sig.signed_at),
                "evidence_sha256": sig.evidence_sha256,
                "ok": not problems,
                "problem": "; ".join(problems) or None,
            }
        )
    return out


def seal_verified(session: Session) -> int:
    """Seal each signature stored before seals were kept whose evidence and audit trail still
    verify (``shopdb db upgrade``); one that does not stays unsealed and ``lot verify`` says so."""

    def verifies(sig: m.Signature) -> bool:
        signed = {did: session.get(m.Disposition, did) for did in sig.disposition_ids}
        return evidence_digest(session, sig) == sig.evidence_sha256 and not (
            _against_the_audit_trail(session, sig, signed)
        )

    return seal.seal_unsealed(session, verifies)
