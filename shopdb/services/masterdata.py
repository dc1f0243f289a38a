"""Drawings, lots, parts, machines, stations, reference optics, calibrations and polishing runs.

Every create or change writes an audit event in the same transaction.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlmodel import Session, select

from shopdb.errors import NotFound, ShopdbError
from shopdb.models import (
    Drawing,
    Lot,
    Machine,
    Part,
    PolishingRun,
    ReferenceCalibration,
    ReferenceOptic,
    Station,
    User,
    utcnow,
)
from shopdb.profile import ProfileError, StationProfile
from shopdb.services.audit import record_event, snapshot, update_record
from shopdb.services.lookups import get_by, latest_run
from shopdb.services.users import require
from shopdb.surface import zernike


def create_audited(
    session: Session,
    actor: User,
    row: Any,
    *,
    action: str = "manage_master_data",
    reason: str = "",
) -> Any:
    """Insert a quality or master record and audit its creation, after checking ``action``."""
    require(actor, action)
    session.add(row)
    session.flush()
    record_event(
        session=session,
        actor=actor.username,
        action="create",
        table_name=row.__tablename__,
        record_id=row.id,
        after=snapshot(row),
        reason=reason,
    )
    return row


def _unique(session: Session, model, field: str, value: str, what: str) -> None:
    if session.exec(select(model).where(getattr(model, field) == value)).first() is not None:
        raise ShopdbError(f"{what} {value!r} already exists")


def add_drawing(
    *,
    session: Session,
    actor: User,
    number: str,
    revision: str,
    surface_form_callout: str,
    test_wavelength_nm: float,
    clear_aperture_mm: float,
    title: str = "",
    nominal_radius_mm: float | None = None,
    min_valid_fraction: float = 0.95,
    decision_rule: str | None = None,
) -> Drawing:
    """A drawing revision. Its ``decision_rule`` (:mod:`shopdb.spc.decision`; the shop's default
    setting when None) is fixed with the revision: a change of rule is a new revision."""
    if session.exec(
        select(Drawing).where(Drawing.number == number, Drawing.revision == revision)
    ).first():
        raise ShopdbError(f"drawing {number} revision {revision} already exists")
    if not test_wavelength_nm > 0 or not clear_aperture_mm > 0:
        raise ShopdbError("drawing test wavelength and clear aperture must be positive")
    if not 0 < min_valid_fraction <= 1:
        raise ShopdbError(f"minimum valid fraction must be in (0, 1], got {min_valid_fraction}")
    from shopdb.services import settings as shop_settings
    from shopdb.spc.decision import DecisionRule
    from shopdb.spec import CalloutError, parse

    try:
        parse(surface_form_callout, default_wavelength_nm=test_wavelength_nm)
    except CalloutError as exc:
        raise ShopdbError(str(exc)) from None
    try:
        rule = DecisionRule.parse(
            decision_rule
            if decision_rule is not None
            else str(shop_settings.get(session, "decision_rule"))
        ).text
    except ValueError as exc:
        raise ShopdbError(f"--decision-rule: {exc}") from None
    return create_audited(
        session,
        actor,
        Drawing(
            number=number,
            revision=revision,
            title=title,
            surface_form_callout=surface_form_callout,
            test_wavelength_nm=test_wavelength_nm,
            clear_aperture_mm=clear_aperture_mm,
            nominal_radius_mm=nominal_radius_mm,
            min_valid_fraction=min_valid_fraction,
            decision_rule=rule,
        ),
    )


def add_lot(*, session: Session, actor: User, code: str, drawing_id: int) -> Lot:
    _unique(session, Lot, "code", code, "lot")
    if session.get(Drawing, drawing_id) is None:
        raise NotFound(f"unknown drawing id {drawing_id}")
    return create_audited(session, actor, Lot(code=code, drawing_id=drawing_id))


def add_part(
    *, session: Session, actor: User, serial: str, drawing_id: int, lot_id: int | None = None
) -> Part:
    _unique(session, Part, "serial", serial, "part serial")
    if session.get(Drawing, drawing_id) is None:
        raise NotFound(f"unknown drawing id {drawing_id}")
    return create_audited(session, actor, Part(serial=serial, drawing_id=drawing_id, lot_id=lot_id))


def add_machine(
    *, session: Session, actor: User, name: str, kind: str = "", notes: str = ""
) -> Machine:
    _unique(session, Machine, "name", name, "machine")
    return create_audited(session, actor, Machine(name=name, kind=kind, notes=notes))


def add_station(
    *,
    session: Session,
    actor: User,
    name: str,
    wavelength_nm: float,
    instrument: str = "",
    requires_reference: bool = True,
    profile: dict | None = None,
) -> Station:
    """A measurement station with its ingest profile (keys: :class:`shopdb.profile.StationProfile`;
    an unknown key or a bad value is refused with a sentence naming it)."""
    _unique(session, Station, "name", name, "station")
    try:
        prof = StationProfile.from_dict(profile)
    except ProfileError as exc:
        raise ShopdbError(str(exc)) from None
    if not wavelength_nm > 0:
        raise ShopdbError(f"station wavelength {wavelength_nm!r} nm must be positive")
    return create_audited(
        session,
        actor,
        Station(
            name=name,
            wavelength_nm=wavelength_nm,
            instrument=instrument,
            requires_reference=requires_reference,
            profile=prof.as_dict(),
        ),
    )


def add_reference(
    *,
    session: Session,
    actor: User,
    name: str,
    diameter_mm: float,
    kind: str = "flat",
    notes: str = "",
) -> ReferenceOptic:
    _unique(session, ReferenceOptic, "name", name, "reference optic")
    return create_audited(
        session, actor, ReferenceOptic(name=name, kind=kind, diameter_mm=diameter_mm, notes=notes)
    )


def add_calibration(
    *,
    session: Session,
    actor: User,
    reference_id: int,
    calibrated_at: datetime,
    valid_until: datetime,
    method: str,
    uncertainty_nm: float,
    coefficients: dict[str, float] | None = None,
    pv_nm: float | None = None,
    rms_nm: float | None = None,
    error_map_blob: str | None = None,
    details: dict | None = None,
) -> ReferenceCalibration:
    """A calibration of a reference optic; ``coefficients`` maps "n,m" to orthonormal Zernike nm."""
    if valid_until <= calibrated_at:
        raise ShopdbError("a calibration must be valid until after it was made")
    if session.get(ReferenceOptic, reference_id) is None:
        raise NotFound(f"unknown reference optic id {reference_id}")
    for key in coefficients or {}:
        try:
            zernike.parse_key(key)
        except ValueError as exc:
            raise ShopdbError(f"calibration coefficient: {exc}") from None
    return create_audited(
        session,
        actor,
        ReferenceCalibration(
            reference_id=reference_id,
            calibrated_at=calibrated_at,
            valid_until=valid_until,
            method=method,
            uncertainty_nm=uncertainty_nm,
            coefficients=dict(coefficients or {}),
            pv_nm=pv_nm,
            rms_nm=rms_nm,
            error_map_blob=error_map_blob,
            details=dict(details or {}),
        ),
        action="calibrate",
    )


def start_run(
    *,
    session: Session,
    actor: User,
    part_serial: str,
    machine_name: str | None,
    started_at: datetime | None = None,
    params: dict | None = None,
    operator: User | None = None,
) -> PolishingRun:
    """The part's next polishing iteration (1, 2, ...)."""
    require(actor, "ingest")
    part = get_by(session, Part, "serial", part_serial, "part serial")
    machine = get_by(session, Machine, "name", machine_name, "machine") if machine_name else None
    if params and "plan_id" in params:  # the run follows a recorded dwell plan
        from shopdb.services.plan import check_plan_for_run

        check_plan_for_run(session, part, params["plan_id"])
    last = latest_run(session, part.id)
    run = PolishingRun(
        part_id=part.id,
        iteration=(last.iteration + 1) if last else 1,
        machine_id=machine.id if machine else None,
        operator_id=(operator or actor).id,
        started_at=started_at or utcnow(),
        params=dict(params or {}),
    )
    return create_audited(session, actor, run, action="ingest")


def end_run(
    *, session: Session, actor: User, part_serial: str, ended_at: datetime | None = None
) -> PolishingRun:
    """End the part's latest polishing run."""
    require(actor, "ingest")
    part = get_by(session, Part, "serial", part_serial, "part serial")
    run = latest_run(session, part.id)
    if run is None:
        raise ShopdbError(f"part {part_serial} has no polishing run")
    if run.ended_at is not None:
        raise ShopdbError(f"run {run.iteration} of {part_serial} ended already")
    return update_record(
        session=session, actor=actor.username, row=run, ended_at=ended_at or utcnow()
    )


def set_part_status(
    *, session: Session, actor: User, part_serial: str, status: str, reason: str = ""
) -> Part:
    from shopdb.models import PART_STATUSES

    if status not in PART_STATUSES:
        raise ShopdbError(f"part status {status!r} is not one of {', '.join(PART_STATUSES)}")
    require(
        actor,
        "plan_runs" if status in ("rework", "scrapped", "in_process", "passed") else "release",
    )
    part = get_by(session, Part, "serial", part_serial, "part serial")
    return update_record(
        session=session, actor=actor.username, row=part, reason=reason, status=status
    )
