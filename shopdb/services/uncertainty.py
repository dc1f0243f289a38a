"""The uncertainty budget of each callout field of a measurement, from the shop's records as
they stood when it was measured (JCGM 100:2008; expanded with k = 2).

Contributions (each named, with its source record, in the result's evidence):

(a) repeatability, Type A — the station's check standard: the standard deviation of that
    quantity on its individuals chart (MR-bar / d2(2), NIST/SEMATECH e-Handbook §6.3.2.2) over
    the current phase, the checks made against the reference calibration in force at the last
    check (a recalibration starts a new phase); its first 20 points, as the chart's limits;
(b) reference calibration, Type B — its per-term standard uncertainties (three-flat records)
    propagated to the quantity (:mod:`shopdb.surface.sensitivity`); a calibration that states
    only a combined uncertainty u is taken as that RMS over the aperture, moving an RMS-type
    quantity by u and a PV-type one by 2 sqrt(3) u (the PV of defocus, the commonest reference
    error, per unit RMS); one that states none takes the shop's ``reference_u_nm`` setting;
(c) reproducibility, Type A — the appraiser variation (AV) of the station's latest gage R&R study
    of that quantity;
(d) reference drift, Type B — where three or more calibrations predict the reference's power
    drift since its last calibration (:mod:`shopdb.spc.drift`), its change as a rectangular
    contribution of that half-width: 2 sqrt(3) dc(2,0) on the sagitta (scaled to a test field),
    dc(2,0) on RMSt; the other quantities remove power.

A quantity of a test field takes the check standard's whole-aperture repeatability (a stated
simplification) and the reference bounds of :func:`shopdb.surface.sensitivity.pv_u_bound`.
"""

from __future__ import annotations

import math
from datetime import datetime

import numpy as np
import sqlalchemy as sa
from sqlmodel import Session, col, select

from shopdb import models as m
from shopdb import quantities
from shopdb.services import settings as shop_settings
from shopdb.services.lookups import profile_of
from shopdb.services.reads._sql import is_newest
from shopdb.spc import drift as drift_fit
from shopdb.spc.constants import d2
from shopdb.spc.gum import Budget, Contribution, combine, rectangular
from shopdb.spec import Callout, fields_of
from shopdb.surface import sensitivity, zernike

BASELINE = 20
PV_PER_RMS = 2 * math.sqrt(3)


def _check_values(
    session: Session, station: m.Station, serial: str, when: datetime
) -> tuple[list[dict], list[int | None]]:
    """The station's check-standard results up to ``when`` (time order) and their calibration."""
    sr, me, pa = m.SurfaceResult, m.Measurement, m.Part
    rows = session.execute(
        sa.select(sr, col(me.reference_calibration_id))
        .select_from(me)
        .join(sr, is_newest(session, sr, me))
        .join(pa, col(pa.id) == me.part_id)
        .where(
            col(pa.serial) == serial,
            col(me.station_id) == station.id,
            col(me.status) == "valid",
            col(me.measured_at) <= when,
        )
        .order_by(col(me.measured_at), col(me.id))
    ).all()
    return [r[0].model_dump() for r in rows], [r[1] for r in rows]


def _repeatability(values: list[float], phases: list[int | None]) -> tuple[float, int] | None:
    """(MR-bar / d2(2), points used) of the current phase's baseline, else of all points."""
    cur = [v for v, p in zip(values, phases, strict=True) if p == phases[-1]][:BASELINE]
    use = cur if len(cur) >= 2 else values[:BASELINE]
    if len(use) < 2:
        return None
    mr = np.abs(np.diff(np.asarray(use, float)))
    return float(mr.mean() / d2(2)), len(use)


def _term_u(cal: m.ReferenceCalibration, default_nm: float) -> tuple[dict, str]:
    """A calibration's per-term standard uncertainties ({} if it has none), and how its
    uncertainty is taken."""
    per_term = (cal.details or {}).get("uncertainty_nm")
    if isinstance(per_term, dict) and per_term:
        return {zernike.parse_key(k): float(v) for k, v in per_term.items()}, "per term"
    if cal.uncertainty_nm > 0:
        return {}, f"{cal.uncertainty_nm:g} nm combined"
    return {}, f"none stated: the shop's default {default_nm:g} nm"


def budgets_for(
    session: Session,
    *,
    station: m.Station,
    when: datetime,
    calibration: m.ReferenceCalibration | None,
    callout: Callout,
    clear_aperture_mm: float,
    extrema: dict | None = None,
) -> dict[str, Budget]:
    """Each callout field's uncertainty budget (see the module notes)."""
    profile = profile_of(station)
    fields = fields_of(callout)
    contributions: dict[str, list[Contribution]] = {f: [] for f in fields}
    scale = (callout.test_field_mm / clear_aperture_mm) ** 2 if callout.test_field_mm else 1.0
    test_field_fields = {"sag", "irregularity", "rsi", "rmst", "rmsi", "rmsa"}

    # (a) repeatability from the check standard
    if profile.check_standard:
        results, phases = _check_values(session, station, profile.check_standard, when)
        for f in fields:
            q = quantities.for_field(f)
            vals = [quantities.value_of(q, r) for r in results]
            pairs = [(v, p) for v, p in zip(vals, phases, strict=True) if v is not None]
            rep = _repeatability([v for v, _ in pairs], [p for _, p in pairs]) if pairs else None
            if rep is not None:
                contributions[f].append(
                    Contribution(
                        "repeatability",
                        rep[0],
                        "A",
                        source=f"check standard {profile.check_standard} on {station.name}, "
                        f"{rep[1]} checks (MR-bar / d2)",
                        dof=rep[1] - 1,
                    )
                )

    # (b) the reference calibration and (d) its drift
    if calibration is not None:
        ref = session.get(m.ReferenceOptic, calibration.reference_id)
        name = ref.name if ref else f"reference {calibration.reference_id}"
        default = float(shop_settings.get(session, "reference_u_nm"))
        term_u, how = _term_u(calibration, default)
        combined = calibration.uncertainty_nm if calibration.uncertainty_nm > 0 else default
        for f in fields:
            tf = callout.test_field_mm is not None and f in test_field_fields
            if term_u:
                key = {"irregularity": "irregularity", "rsi": "rsi", "pvr": "pv"}.get(f)
                ext = None if (tf or extrema is None or key is None) else extrema.get(key)
                u = sensitivity.reference_u(
                    f, term_u, extrema=ext, aperture_scale=scale if tf else 1.0
                )
            elif f == "slope":
                u = None
            else:
                q = quantities.for_field(f)
                u = combined * (PV_PER_RMS if q.pv_type else 1.0)
            if u is not None:
                contributions[f].append(
                    Contribution(
                        "reference calibration",
                        u,
                        "B",
                        source=f"{name} calibration {calibration.id} ({calibration.method}; {how})",
                    )
                )
        change = _predicted_power_change(session, calibration.reference_id, when)
        if change is not None:
            for f, half in (("sag", PV_PER_RMS * abs(change)), ("rmst", abs(change))):
                if f in contributions:
                    a = half * (scale if callout.test_field_mm and f == "sag" else 1.0)
                    contributions[f].append(
                        rectangular(
                            "reference drift",
                            a,
                            source=f"{name}: power drift predicted {change:+.2f} nm since its "
                            "last calibration",
                        )
                    )

    # (c) reproducibility from the latest gage study
    for f in fields:
        q = quantities.for_field(f)
        study = session.exec(
            select(m.GageStudy)
            .where(
                m.GageStudy.station_id == station.id,
                m.GageStudy.quantity == q.name,
                col(m.GageStudy.studied_at) <= when,
            )
            .order_by(col(m.GageStudy.studied_at).desc())
        ).first()
        if study is not None:
            contributions[f].append(
                Contribution(
                    "reproducibility",
                    study.reproducibility,
                    "A",
                    source=f"gage study {study.id} of {station.name}, "
                    f"{study.studied_at:%Y-%m-%d} ({study.method}, AV)",
                )
            )
    return {f: combine(c) for f, c in contributions.items() if c}


def _predicted_power_change(session: Session, reference_id: int, when: datetime) -> float | None:
    """The power term's change predicted between the last calibration before ``when`` and
    ``when``, from the calibrations up to then (None with fewer than three)."""
    cals = session.exec(
        select(m.ReferenceCalibration)
        .where(
            m.ReferenceCalibration.reference_id == reference_id,
            col(m.ReferenceCalibration.calibrated_at) <= when,
        )
        .order_by(col(m.ReferenceCalibration.calibrated_at))
    ).all()
    points = [(c.calibrated_at, c.coefficients.get("2,0")) for c in cals]
    points = [(t, v) for t, v in points if v is not None]
    if len(points) < 3:
        return None
    fit = drift_fit.drift([t for t, _ in points], [v for _, v in points], now=when)
    return fit.predicted_change_since_last
