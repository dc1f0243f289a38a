"""Record lookups the use-cases share: one way to find a record by name, a part's runs and final
measurement, a measurement's newest result, a drawing's callout, the calibration in force."""

from __future__ import annotations

import functools
from collections.abc import Callable
from datetime import datetime
from typing import Any, TypeVar

from sqlmodel import Session, SQLModel, col, select

from shopdb import models as m
from shopdb.errors import NotFound, ShopdbError
from shopdb.profile import ProfileError, StationProfile
from shopdb.spec import Callout, CalloutError, parse

CHECK_DRAWING = "CHECK-STANDARD"  # drawing number of station check artefacts

T = TypeVar("T", bound=SQLModel)


def get_by(session: Session, model: type[T], field: str, value: Any, what: str) -> T:
    """The record whose ``field`` is ``value``; NotFound naming ``what`` otherwise."""
    if isinstance(value, str) and "\x00" in value:
        raise NotFound(f"unknown {what} {value!r}")  # no record holds a NUL (db.py refuses it)
    row = session.exec(select(model).where(getattr(model, field) == value)).first()
    if row is None:
        raise NotFound(f"unknown {what} {value!r}")
    return row


def get_id(session: Session, model: type[T], record_id: int, what: str) -> T:
    row = session.get(model, record_id)
    if row is None:
        raise NotFound(f"no {what} {record_id}")
    return row


def latest_run(session: Session, part_id: int) -> m.PolishingRun | None:
    """The part's highest polishing iteration."""
    return session.exec(
        select(m.PolishingRun)
        .where(m.PolishingRun.part_id == part_id)
        .order_by(col(m.PolishingRun.iteration).desc())
    ).first()


def run_measurement(session: Session, run: m.PolishingRun) -> m.Measurement | None:
    """The run's latest valid measurement (the map after it)."""
    return session.exec(
        select(m.Measurement)
        .where(m.Measurement.run_id == run.id, m.Measurement.status == "valid")
        .order_by(col(m.Measurement.measured_at).desc())
    ).first()


def final_measurement(session: Session, part: m.Part) -> tuple[m.Measurement | None, str | None]:
    """The latest valid measurement after the part's last polishing run started (or None, why)."""
    last_run = latest_run(session, part.id)
    q = select(m.Measurement).where(
        m.Measurement.part_id == part.id, m.Measurement.status == "valid"
    )
    if last_run is not None:
        q = q.where(m.Measurement.measured_at >= last_run.started_at)
    me = session.exec(q.order_by(col(m.Measurement.measured_at).desc())).first()
    if me is None:
        return None, (
            f"no valid measurement after polishing run {last_run.iteration}"
            if last_run
            else "no valid measurement"
        )
    return me, None


def newest_result(session: Session, measurement_id: int) -> m.SurfaceResult:
    """The measurement's newest result (reanalysis adds results; the newest is the one in use)."""
    res = session.exec(
        select(m.SurfaceResult)
        .where(m.SurfaceResult.measurement_id == measurement_id)
        .order_by(col(m.SurfaceResult.id).desc())
    ).first()
    if res is None:
        raise NotFound(f"measurement {measurement_id} has no result")
    return res


def drawing_callout(session: Session, drawing_id: int) -> tuple[m.Drawing, Callout]:
    d = get_id(session, m.Drawing, drawing_id, "drawing")
    try:
        return d, parse(d.surface_form_callout, default_wavelength_nm=d.test_wavelength_nm)
    except CalloutError as exc:
        raise ShopdbError(f"drawing {d.number}: {exc}") from None


def callout_lookup(session: Session) -> Callable[[int], Callout]:
    """drawing id -> parsed callout, parsing each drawing once per query."""
    return functools.cache(lambda drawing_id: drawing_callout(session, drawing_id)[1])


def drawing_ref(session: Session, ref: str) -> m.Drawing:
    """A drawing by ``NUMBER`` (its newest revision) or ``NUMBER:REVISION``."""
    number, _, rev = ref.partition(":")
    q = select(m.Drawing).where(m.Drawing.number == number)
    if rev:
        q = q.where(m.Drawing.revision == rev)
    row = session.exec(q.order_by(col(m.Drawing.revision).desc())).first()
    if row is None:
        raise NotFound(f"unknown drawing {ref!r}")
    return row


def profile_of(station: m.Station) -> StationProfile:
    """The station's typed profile (a stored profile that no longer validates is an error)."""
    try:
        return StationProfile.from_dict(station.profile)
    except ProfileError as exc:
        raise ShopdbError(f"station {station.name}: {exc}") from None


def calibration_in_force(
    session: Session, reference_id: int, at: datetime
) -> m.ReferenceCalibration | None:
    """The latest calibration of the reference made at or before ``at`` (valid or not)."""
    return session.exec(
        select(m.ReferenceCalibration)
        .where(
            m.ReferenceCalibration.reference_id == reference_id,
            m.ReferenceCalibration.calibrated_at <= at,
        )
        .order_by(col(m.ReferenceCalibration.calibrated_at).desc())
    ).first()


def lot_id(session: Session, code: str) -> int:
    lot = get_by(session, m.Lot, "code", code, "lot")
    assert lot.id is not None
    return lot.id


def reference_id(session: Session, name: str) -> int:
    ref = get_by(session, m.ReferenceOptic, "name", name, "reference optic")
    assert ref.id is not None
    return ref.id
