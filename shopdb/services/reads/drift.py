"""Reference drift: a calibrated quantity of a reference optic over its calibrations, and the
measurements whose verdict its predicted drift would change."""

from __future__ import annotations

import math
from datetime import datetime

import pandas as pd
import sqlalchemy as sa
from sqlmodel import Session, col, select

from shopdb import models as m
from shopdb.errors import ShopdbError
from shopdb.services import verdict
from shopdb.services.lookups import callout_lookup, get_by
from shopdb.services.reads._sql import is_newest
from shopdb.spc import drift
from shopdb.surface import zernike


def _term_value(c: m.ReferenceCalibration, term: str) -> float | None:
    if term == "pv":
        return c.pv_nm
    if term == "rms":
        return c.rms_nm
    return c.coefficients.get(term)


def reference_drift(
    *,
    session: Session,
    reference: str,
    term: str = "2,0",
    threshold_nm: float | None = None,
    now: datetime | None = None,
) -> dict:
    """Drift of one calibrated quantity of a reference optic: ``term`` "n,m", "pv" or "rms"."""
    if term not in ("pv", "rms"):
        try:
            term = zernike.key(*zernike.parse_key(term))
        except ValueError as exc:
            raise ShopdbError(f"--term: {exc}; or pv, rms") from None
    ref = get_by(session, m.ReferenceOptic, "name", reference, "reference optic")
    cals = session.exec(
        select(m.ReferenceCalibration)
        .where(m.ReferenceCalibration.reference_id == ref.id)
        .order_by(col(m.ReferenceCalibration.calibrated_at))
    ).all()
    rows = []
    for c in cals:
        v = _term_value(c, term)
        if v is not None:
            rows.append(
                {
                    "calibration_id": c.id,
                    "calibrated_at": c.calibrated_at,
                    "valid_until": c.valid_until,
                    "value": float(v),
                    "uncertainty_nm": c.uncertainty_nm,
                }
            )
    table = pd.DataFrame(
        rows, columns=["calibration_id", "calibrated_at", "valid_until", "value", "uncertainty_nm"]
    )
    now = now or m.utcnow()
    fit = (
        drift.drift(
            table["calibrated_at"].tolist(),
            table["value"].to_numpy(),
            now=now,
            threshold=threshold_nm,
        )
        if len(rows) >= 3
        else None
    )
    last = cals[-1] if cals else None
    return {
        "reference": reference,
        "term": term,
        "calibrations": table,
        "drift": fit,
        "last_calibration": last.calibrated_at if last else None,
        "valid_until": last.valid_until if last else None,
        "overdue": bool(last and last.valid_until < now),
    }


IMPACT_COLUMNS = [
    "measurement_id",
    "part",
    "lot",
    "lot_status",
    "measured_at",
    "verdict",
    "verdict_if_corrected",
]


def drift_impact(*, session: Session, reference: str, now: datetime | None = None) -> pd.DataFrame:
    """Measurements made with the reference since its last calibration whose conformance would
    change if the reference's predicted power drift were subtracted.

    The reference's power adds to the measured sagitta: 2 sqrt(3) dc(2,0) over the clear aperture
    (shared/REFERENCES.md), scaled by (d / D)^2 for a test field of diameter d in a clear
    aperture D (the drift is a defocus of the whole aperture). The verdict owner judges both."""
    info = reference_drift(session=session, reference=reference, term="2,0", now=now)
    fit, last = info["drift"], info["last_calibration"]
    if fit is None or last is None:
        return pd.DataFrame(columns=IMPACT_COLUMNS)
    ref = get_by(session, m.ReferenceOptic, "name", reference, "reference optic")
    sr, me = m.SurfaceResult, m.Measurement
    q = (
        sa.select(
            col(me.id),
            col(me.measured_at),
            col(m.Part.serial),
            col(m.Part.drawing_id),
            col(m.Lot.code),
            col(m.Lot.status),
            col(sr.id),
            col(m.Drawing.clear_aperture_mm),
        )
        .select_from(me)
        .join(
            m.ReferenceCalibration,
            col(m.ReferenceCalibration.id) == me.reference_calibration_id,
        )
        .join(m.Part, col(m.Part.id) == me.part_id)
        .join(m.Drawing, col(m.Drawing.id) == m.Part.drawing_id)
        .outerjoin(m.Lot, col(m.Lot.id) == m.Part.lot_id)
        .join(sr, is_newest(session, sr, me))
        .where(
            col(m.ReferenceCalibration.reference_id) == ref.id,
            col(me.measured_at) >= last,
            col(me.status) == "valid",
        )
        .order_by(col(me.measured_at))
    )
    rows = []
    callout_of = callout_lookup(session)
    rate_per_day = fit.rate_per_month / drift.DAYS_PER_MONTH
    for mid, when, serial, did, lot, lot_status, rid, ca_mm in session.execute(q).all():
        c = callout_of(did)
        conf = verdict.stored_conformance(session, rid)
        sag = next((f.measured for f in conf.fields if f.field == "sag"), None)
        if sag is None:
            continue  # the drift moves only the sagitta; a callout without one is untouched
        scale = (conf.test_field.diameter_mm / ca_mm) ** 2 if conf.test_field else 1.0
        delta_c20 = rate_per_day * (when - last).total_seconds() / 86400
        corrected = verdict.judge_values(
            c, conf, {"sag": sag - 2 * math.sqrt(3) * delta_c20 * scale}
        )
        if conf.conforms != corrected.conforms:
            rows.append(
                {
                    "measurement_id": mid,
                    "part": serial,
                    "lot": lot,
                    "lot_status": lot_status,
                    "measured_at": when,
                    "verdict": "pass" if conf.conforms else "fail",
                    "verdict_if_corrected": "pass" if corrected.conforms else "fail",
                }
            )
    return pd.DataFrame(rows, columns=IMPACT_COLUMNS)
