"""Lot release: per-part evidence and verdicts, QA dispositions, electronic signatures.

Verdict rules (a part passes only if all hold; each failure is stated):

* its final measurement is the latest valid measurement taken after its last polishing run
  started, or the one QA designates;
* that measurement's newest result meets every field of the drawing's callout (with a test
  field, the worst sub-aperture of that diameter, see :mod:`shopdb.surface.subaperture`);
* it was taken against a reference calibration valid at that time;
* the station's check standard was in control: its latest check at or before the measurement,
  no older than the profile's ``check_max_age_days`` (default 7), fired none of ``HOLD_RULES``;
* the valid-pixel fraction is at least the drawing's minimum.

``pass`` = every rule holds; ``fail`` = a callout field fails on a measurement that is otherwise
sound; ``blocked`` = the evidence is incomplete or untrustworthy (no measurement, calibration,
check standard or enough valid pixels).

A disposition stores the evidence and verdict QA saw (write-once; a later one supersedes it).
A signature lists the dispositions it signs; its ``evidence_sha256`` is the SHA-256 of the
canonical JSON (sorted keys, no white space) of the signed records as they are in the database —
lot, drawing, each part, its disposition, measurement, result with its Zernike terms and
reference calibration — together with the signature's own lot, signer, printed name, meaning and
time. Verification recomputes it: an edit to any of those records, or a signature moved to another
lot, no longer matches.
"""

from __future__ import annotations

import hashlib
from datetime import datetime, timedelta

import numpy as np
from sqlmodel import Session, select

from shopdb import models as m
from shopdb.blobs import BlobStore
from shopdb.errors import NotFound, PermissionDenied, ShopdbError
from shopdb.models import utcnow
from shopdb.services import queries
from shopdb.services.audit import canonical_json, record_event, snapshot, update_record
from shopdb.services.masterdata import create_audited, get_by
from shopdb.services.users import authenticate, require
from shopdb.spec import evaluate
from shopdb.surface import subaperture
from shopdb.surface.analysis import AnalysisSettings
from shopdb.surface.maps import SurfaceMap

CHECK_MAX_AGE_DAYS = 7
# The check-standard signals that hold a release: a point beyond the 3-sigma limits (N1), a shift
# (N2: 9 on one side) and a trend (N3: 6 rising or falling) — the signs of a station or
# reference that has moved. Zone and pattern rules (N4-N8) call for a look, not a hold: with all
# eight rules an in-control check standard signals every few weeks by chance.
HOLD_RULES = ("N1", "N2", "N3")
DECISION_FOR_STATUS = {
    "accept": "released",
    "accept_deviation": "released",
    "reject": "rejected",
    "rework": "rework",
}


def _iso(t: datetime | None) -> str | None:
    return t.isoformat() if t else None


# --- evidence and verdicts ----------------------------------------------------------------


def final_measurement(session: Session, part: m.Part) -> tuple[m.Measurement | None, str | None]:
    """The latest valid measurement after the part's last polishing run started (or None, why)."""
    last_run = session.exec(
        select(m.PolishingRun)
        .where(m.PolishingRun.part_id == part.id)
        .order_by(m.PolishingRun.iteration.desc())
    ).first()
    q = select(m.Measurement).where(
        m.Measurement.part_id == part.id, m.Measurement.status == "valid"
    )
    if last_run is not None:
        q = q.where(m.Measurement.measured_at >= last_run.started_at)
    me = session.exec(q.order_by(m.Measurement.measured_at.desc())).first()
    if me is None:
        return None, (
            f"no valid measurement after polishing run {last_run.iteration}"
            if last_run
            else "no valid measurement"
        )
    return me, None


def station_state(
    session: Session, station: m.Station, when: datetime, charts: dict | None = None
) -> str | None:
    """None if the station's check standard was in control for a measurement at ``when``, else why.

    ``charts`` (station name -> check chart) saves recomputing a station's chart per part."""
    serial = station.profile.get("check_standard")
    if not serial:
        return f"station {station.name} has no check standard, so its state is unknown"
    charts = {} if charts is None else charts
    if station.name not in charts:
        charts[station.name] = queries.station_check(session=session, station=station.name)
    chart = charts[station.name]
    max_age = timedelta(days=station.profile.get("check_max_age_days", CHECK_MAX_AGE_DAYS))
    if chart.empty:
        return f"check standard {serial} has fewer than 2 measurements on {station.name}"
    times = np.array([t.timestamp() for t in chart["measured_at"]])
    before = np.flatnonzero(times <= when.timestamp())
    if before.size == 0 or when.timestamp() - times[before[-1]] > max_age.total_seconds():
        return (
            f"no check of {serial} on {station.name} in the {max_age.days} days before "
            f"{when:%Y-%m-%d}"
        )
    point = chart.iloc[before[-1]]
    fired = [r for r in point["rules"] if r in HOLD_RULES]
    if fired:
        return (
            f"check standard {serial} on {station.name} was out of control on "
            f"{point['measured_at']:%Y-%m-%d} ({', '.join(fired)})"
        )
    return None


def _test_field_values(
    blobs: BlobStore, me: m.Measurement, res: m.SurfaceResult, drawing: m.Drawing, field_mm: float
) -> tuple[dict, dict]:
    surface = SurfaceMap(
        blobs.get(me.blob_key).astype(np.float64), me.dx_mm, me.wavelength_nm, kind="surface"
    )
    scan = subaperture.scan(
        surface,
        AnalysisSettings.from_dict(res.settings),
        clear_aperture_mm=drawing.clear_aperture_mm,
        field_diameter_mm=field_mm,
    )
    values = {**res.model_dump(), **scan.worst}
    info = {
        "test_field_mm": field_mm,
        "sub_apertures": scan.count,
        "worst_at_mm": {k: list(v) for k, v in scan.where_mm.items()},
    }
    return values, info


def part_evidence(
    session: Session,
    blobs: BlobStore,
    part: m.Part,
    *,
    measurement_id: int | None = None,
    charts: dict | None = None,
) -> dict:
    """The evidence and verdict of one part, as plain JSON-able data."""
    drawing, callout = queries.drawing_callout(session, part.drawing_id)
    out: dict = {
        "part_id": part.id,
        "serial": part.serial,
        "part_status": part.status,
        "measurement_id": None,
        "result_id": None,
        "measured_at": None,
        "station": None,
        "operator_id": None,
        "designated": measurement_id is not None,
        "calibration": None,
        "fields": [],
        "test_field": None,
        "valid_fraction": None,
        "min_valid_fraction": drawing.min_valid_fraction,
        "blocked": [],
        "verdict": "blocked",
    }
    if measurement_id is not None:
        me = session.get(m.Measurement, measurement_id)
        if me is None or me.part_id != part.id:
            raise ShopdbError(f"measurement {measurement_id} is not a measurement of {part.serial}")
        if me.status != "valid":
            raise ShopdbError(f"measurement {measurement_id} is {me.status}, not valid")
    else:
        me, why = final_measurement(session, part)
        if me is None:
            out["blocked"].append(why)
            return out
    res = queries.newest_result(session, me.id)
    station = session.get(m.Station, me.station_id)
    out.update(
        measurement_id=me.id,
        result_id=res.id,
        measured_at=_iso(me.measured_at),
        station=station.name,
        operator_id=me.operator_id,
        valid_fraction=res.valid_fraction,
    )
    values = res.model_dump()
    if callout.test_field_mm:
        try:
            values, out["test_field"] = _test_field_values(
                blobs, me, res, drawing, callout.test_field_mm
            )
        except ValueError as exc:
            out["blocked"].append(f"test field: {exc}")
    verdicts = evaluate(callout, values)
    out["fields"] = [v.as_dict() for v in verdicts]

    if me.reference_calibration_id is None:
        out["blocked"].append("measured without a reference calibration")
    else:
        cal = session.get(m.ReferenceCalibration, me.reference_calibration_id)
        ref = session.get(m.ReferenceOptic, cal.reference_id)
        out["calibration"] = {
            "id": cal.id,
            "reference": ref.name,
            "calibrated_at": _iso(cal.calibrated_at),
            "valid_until": _iso(cal.valid_until),
            "method": cal.method,
            "uncertainty_nm": cal.uncertainty_nm,
        }
        if not cal.calibrated_at <= me.measured_at <= cal.valid_until:
            out["blocked"].append(
                f"reference {ref.name} calibration {cal.id} was not valid on "
                f"{me.measured_at:%Y-%m-%d} (valid {cal.calibrated_at:%Y-%m-%d} to "
                f"{cal.valid_until:%Y-%m-%d})"
            )
    state = station_state(session, station, me.measured_at, charts)
    if state:
        out["blocked"].append(state)
    if res.valid_fraction < drawing.min_valid_fraction:
        out["blocked"].append(
            f"valid pixels {res.valid_fraction:.1%} are below the drawing's minimum "
            f"{drawing.min_valid_fraction:.1%}"
        )
    if out["blocked"]:
        out["verdict"] = "blocked"
    else:
        out["verdict"] = "pass" if all(v.passed for v in verdicts) else "fail"
    return out


def _current_dispositions(session: Session, lot_id: int) -> dict[int, m.Disposition]:
    """part id -> its latest disposition in the lot."""
    rows = session.exec(
        select(m.Disposition).where(m.Disposition.lot_id == lot_id).order_by(m.Disposition.id)
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


def lot_evidence(*, session: Session, blobs: BlobStore, actor: m.User, code: str) -> dict:
    """Everything QA needs on one screen: per part evidence, verdict and current disposition,
    the lot's signatures and whether they still verify."""
    require(actor, "view")
    lot = get_by(session, m.Lot, "code", code, "lot")
    drawing, callout = queries.drawing_callout(session, lot.drawing_id)
    current = _current_dispositions(session, lot.id)
    parts = []
    charts: dict = {}
    for part in session.exec(select(m.Part).where(m.Part.lot_id == lot.id).order_by(m.Part.serial)):
        d = current.get(part.id)
        if d is not None and lot.status != "open":
            ev = dict(d.verdict)  # a signed lot shows what was signed
        else:
            designated = (
                d.verdict.get("measurement_id") if d and d.verdict.get("designated") else None
            )
            ev = part_evidence(session, blobs, part, measurement_id=designated, charts=charts)
        ev["disposition"] = _disposition_view(d, session) if d else None
        parts.append(ev)
    return {
        "lot": lot.code,
        "lot_id": lot.id,
        "status": lot.status,
        "drawing": f"{drawing.number} rev {drawing.revision}",
        "drawing_title": drawing.title,
        "callout": drawing.surface_form_callout,
        "wavelength_nm": callout.wavelength_nm,
        "clear_aperture_mm": drawing.clear_aperture_mm,
        "parts": parts,
        "signatures": verify_lot(session=session, code=code),
    }


def lots(*, session: Session, actor: m.User, include_signed: bool = False) -> list[dict]:
    """Lots awaiting release (open) — or all lots — with part counts and how many are disposed."""
    require(actor, "view")
    q = select(m.Lot).order_by(m.Lot.code)
    if not include_signed:
        q = q.where(m.Lot.status == "open")
    out = []
    for lot in session.exec(q):
        n = len(session.exec(select(m.Part.id).where(m.Part.lot_id == lot.id)).all())
        drawing = session.get(m.Drawing, lot.drawing_id)
        out.append(
            {
                "lot": lot.code,
                "status": lot.status,
                "drawing": drawing.number,
                "parts": n,
                "disposed": len(_current_dispositions(session, lot.id)),
            }
        )
    return out


# --- dispositions -------------------------------------------------------------------------


def dispose(
    *,
    session: Session,
    blobs: BlobStore,
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
    ev = part_evidence(session, blobs, part, measurement_id=measurement_id)
    if decision == "accept" and ev["verdict"] != "pass":
        failed = [f["field"] for f in ev["fields"] if not f["passed"]]
        why = "; ".join(ev["blocked"]) or f"fails {', '.join(failed)}"
        raise ShopdbError(
            f"part {serial} cannot be accepted: verdict {ev['verdict']} ({why}); "
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
        result_id=ev["result_id"],
        decision=decision,
        deviation_number=deviation_number or None,
        reason=reason,
        decided_by_id=actor.id,
        verdict=ev,
    )
    create_audited(session, actor, d, action="release", reason=reason)
    return d


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
                        .order_by(m.ZernikeTerm.n, m.ZernikeTerm.m)
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
    signer = authenticate(session=session, username=actor.username, password=password)
    lot = session.exec(select(m.Lot).where(m.Lot.code == code).with_for_update()).first()
    if lot is None:
        raise NotFound(f"unknown lot {code!r}")
    if lot.status != "open":
        last = session.exec(
            select(m.Signature).where(m.Signature.lot_id == lot.id).order_by(m.Signature.id.desc())
        ).first()
        by = f" by {last.printed_name} at {last.signed_at:%Y-%m-%d %H:%M} UTC" if last else ""
        raise ShopdbError(f"lot {code} was already {lot.status}{by}; nothing signed")
    parts = session.exec(select(m.Part).where(m.Part.lot_id == lot.id).order_by(m.Part.id)).all()
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
        own = [p.serial for p in parts if current[p.id].verdict.get("operator_id") == signer.id]
        if own:
            raise PermissionDenied(
                f"{signer.username} operated the final measurement of {', '.join(own)}; "
                "another QA inspector must sign (shop policy: no self-release)"
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


def verify_lot(*, session: Session, code: str) -> list[dict]:
    """Each signature of the lot with ``ok`` and, if it fails, the problem in plain words."""
    lot = get_by(session, m.Lot, "code", code, "lot")
    now_parts = set(session.exec(select(m.Part.id).where(m.Part.lot_id == lot.id)).all())
    out = []
    for sig in session.exec(
        select(m.Signature).where(m.Signature.lot_id == lot.id).order_by(m.Signature.id)
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
