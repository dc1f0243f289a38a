"""The one owner of "does this measurement meet its drawing".

A verdict has two parts.

* **Conformance** — each field of the drawing's surface-form callout judged on the map: with a
  test field (``; Ø d``), the sagitta, irregularity, RSI and RMSt/i/a are those of the worst
  sub-aperture of that diameter across the clear aperture (ISO 10110-5:2015: the tolerance applies
  to every such area; :mod:`shopdb.surface.subaperture`), the other fields (PVr, slope, PSD
  bands) those of the whole clear aperture; and what in the map itself makes it unfit to judge
  (fewer valid pixels than the drawing's minimum, a test field that cannot be evaluated). It
  depends on the map and the drawing alone, so it is judged once, when a result is stored
  (ingest, re-analysis), and kept with the result (:class:`shopdb.models.CalloutOutcome`); the
  KPIs read it from there.
* **Blockers from other records** — whether the evidence can be trusted: a reference calibration
  valid when the map was taken, the station's check standard in control then (its latest check
  at or before the measurement, no older than the profile's ``check_max_age_days``, fired none
  of ``HOLD_RULES``). They are read when the verdict is asked for.

A new release rule with a fixed threshold is one more line in :func:`judge_map` (a property of
the map: the KPIs follow it too) or in :func:`measurement_verdict` (a property of other records).

``pass`` = every field conforms and nothing blocks; ``fail`` = a field fails on otherwise sound
evidence; ``blocked`` = the evidence is incomplete or untrustworthy. Every reason is stated.
Release, the part and measurement pages, the floor, the KPIs, the certificate and the demo all
take their verdicts from here.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from datetime import datetime, timedelta
from typing import Any

import numpy as np
import sqlalchemy as sa
from sqlmodel import Session, col, select

from shopdb import models as m
from shopdb.blobs import BlobStore
from shopdb.errors import ShopdbError
from shopdb.services.lookups import (
    drawing_callout,
    final_measurement,
    get_id,
    newest_result,
    profile_of,
)
from shopdb.spc.decision import DecisionRule
from shopdb.spc.gum import Budget
from shopdb.spec import Callout, FieldOutcome, evaluate, values_from_result
from shopdb.surface.maps import SurfaceMap
from shopdb.surface.settings import AnalysisSettings

# The check-standard signals that hold a release: a point beyond the 3-sigma limits (N1), a shift
# (N2: 9 on one side) and a trend (N3: 6 rising or falling) — the signs of a station or
# reference that has moved. Zone and pattern rules (N4-N8) call for a look, not a hold: with all
# eight rules an in-control check standard signals every few weeks by chance.
HOLD_RULES = ("N1", "N2", "N3")
# test-field quantities: judged on the worst sub-aperture (see the module notes)


@dataclass(frozen=True)
class TestField:
    """How a callout's test field was evaluated: the sub-apertures of ``diameter_mm`` analysed,
    where the worst of each quantity lies ((x, y) mm from the aperture centre, +x along the
    columns, +y up the map), or why it could not be evaluated."""

    diameter_mm: float
    sub_apertures: int = 0
    worst_at_mm: dict[str, list[float]] = field(default_factory=dict)
    error: str | None = None

    def as_dict(self) -> dict:
        return {
            "diameter_mm": self.diameter_mm,
            "sub_apertures": self.sub_apertures,
            "worst_at_mm": dict(self.worst_at_mm),
            "error": self.error,
        }

    @classmethod
    def from_dict(cls, d: dict | None) -> TestField | None:
        if not d:
            return None
        return cls(
            float(d.get("diameter_mm") or d.get("test_field_mm")),
            int(d.get("sub_apertures", 0)),
            {k: list(v) for k, v in (d.get("worst_at_mm") or {}).items()},
            d.get("error"),
        )


@dataclass(frozen=True)
class Conformance:
    """The callout's fields judged on one map, and what in the map blocks judging it (see the
    module notes)."""

    fields: tuple[FieldOutcome, ...]
    test_field: TestField | None = None
    blocked: tuple[str, ...] = ()

    @property
    def conforms(self) -> bool:
        """Every field passes (the map's blockers aside)."""
        return all(f.passed for f in self.fields)

    @property
    def passes(self) -> bool:
        """Every field passes and nothing in the map blocks the judgement."""
        return self.conforms and not self.blocked

    @property
    def conditional(self) -> bool:
        """Some field lies inside its uncertainty range (neither outcome proven)."""
        return any(f.conditional for f in self.fields)

    @property
    def failed(self) -> list[str]:
        return [f.field for f in self.fields if not f.passed]


@dataclass(frozen=True)
class Verdict:
    """A measurement (or a part's final measurement) against its drawing, with its evidence."""

    verdict: str  # "pass", "fail" or "blocked"
    fields: tuple[FieldOutcome, ...] = ()
    test_field: TestField | None = None
    blocked: tuple[str, ...] = ()
    part_id: int | None = None
    serial: str | None = None
    part_status: str | None = None
    measurement_id: int | None = None
    result_id: int | None = None
    measured_at: str | None = None
    station: str | None = None
    operator_id: int | None = None
    designated: bool = False
    calibration: dict | None = None
    valid_fraction: float | None = None
    min_valid_fraction: float | None = None

    @property
    def failed(self) -> list[str]:
        return [f.field for f in self.fields if not f.passed]

    @property
    def reasons(self) -> list[str]:
        """Every reason in words: what blocks, then each failing field, measured against limit."""
        out = list(self.blocked)
        for f in self.fields:
            if f.passed:
                continue
            q = f.quantity
            if f.measured is None:
                out.append(f"{q.label}: no value")
            elif abs(f.measured) <= f.limit:  # not over its limit, but not proven under it
                out.append(
                    f"{q.label} {abs(f.measured):.1f} {q.unit} is inside the uncertainty range "
                    f"of its limit {f.limit:.1f} {q.unit} (U = {f.U:.1f} {q.unit}; rule {f.rule} "
                    f"accepts up to {f.acceptance_limit:.1f} {q.unit})"
                )
            else:
                out.append(f"{q.label} {abs(f.measured):.1f} {q.unit} > {f.limit:.1f} {q.unit}")
        return out

    def as_dict(self) -> dict[str, Any]:
        """JSON form (frozen into a disposition when QA decides; the CLI's ``--json``)."""
        return {
            "verdict": self.verdict,
            "fields": [f.as_dict() for f in self.fields],
            "test_field": self.test_field.as_dict() if self.test_field else None,
            "blocked": list(self.blocked),
            "reasons": self.reasons,
            "part_id": self.part_id,
            "serial": self.serial,
            "part_status": self.part_status,
            "measurement_id": self.measurement_id,
            "result_id": self.result_id,
            "measured_at": self.measured_at,
            "station": self.station,
            "operator_id": self.operator_id,
            "designated": self.designated,
            "calibration": self.calibration,
            "valid_fraction": self.valid_fraction,
            "min_valid_fraction": self.min_valid_fraction,
        }

    @classmethod
    def from_dict(cls, d: dict) -> Verdict:
        """From :meth:`as_dict` (also the form frozen into dispositions by earlier versions)."""
        names = {f for f in cls.__dataclass_fields__}
        kw = {k: v for k, v in d.items() if k in names}
        kw["fields"] = tuple(FieldOutcome.from_dict(f) for f in d.get("fields") or [])
        kw["test_field"] = TestField.from_dict(d.get("test_field"))
        kw["blocked"] = tuple(d.get("blocked") or ())
        return cls(**kw)


# --- conformance: judged on the map, stored with the result -------------------------------------


def judge_map(
    result: dict,
    callout: Callout,
    *,
    surface: SurfaceMap | None,
    settings: AnalysisSettings,
    clear_aperture_mm: float,
    min_valid_fraction: float = 0.0,
    budgets: dict[str, Budget] | None = None,
    rule: DecisionRule | None = None,
) -> Conformance:
    """The callout's fields judged on an analysed map (see the module notes): ``result`` is the
    whole-aperture result in its stored form (:meth:`Analysis.stored`, or a result row's
    fields); the map (``surface``, as stored) is needed only for a test field; ``budgets`` the
    fields' uncertainty (:mod:`shopdb.services.uncertainty`), judged by the drawing's decision
    ``rule``."""
    values = values_from_result(callout, result)
    blocked = []
    valid = result.get("valid_fraction")
    if valid is not None and valid < min_valid_fraction:
        blocked.append(
            f"valid pixels {valid:.1%} are below the drawing's minimum {min_valid_fraction:.1%}"
        )
    test_field = None
    if callout.test_field_mm:
        if surface is None:
            raise ValueError("a test field is judged on the map: give the surface")
        from shopdb.surface import subaperture  # numeric libraries only when a field is scanned

        try:
            scan = subaperture.scan(
                surface,
                settings,
                clear_aperture_mm=clear_aperture_mm,
                field_diameter_mm=callout.test_field_mm,
            )
        except ValueError as exc:
            test_field = TestField(callout.test_field_mm, error=str(exc))
            blocked.append(f"test field: {exc}")
        else:
            for column in subaperture.FIELDS:
                if column.removesuffix("_nm") in values:
                    values[column.removesuffix("_nm")] = scan.worst[column]
            test_field = TestField(
                callout.test_field_mm,
                scan.count,
                {k.removesuffix("_nm"): list(v) for k, v in scan.where_mm.items()},
            )
    fields = tuple(evaluate(callout, values, budgets=budgets, rule=rule))
    return Conformance(fields, test_field, tuple(blocked))


def record(
    session: Session, *, result_id: int, drawing_id: int, conformance: Conformance
) -> m.CalloutOutcome:
    """Store a result's conformance (in the caller's transaction, with the result)."""
    row = m.CalloutOutcome(
        result_id=result_id,
        drawing_id=drawing_id,
        conforms=conformance.conforms,
        passes=conformance.passes,
        conditional=conformance.conditional,
        failed_fields=",".join(conformance.failed),
        fields=[f.as_dict() for f in conformance.fields],
        test_field=conformance.test_field.as_dict() if conformance.test_field else None,
        blockers=list(conformance.blocked),
    )
    session.add(row)
    session.flush()
    return row


def stored_conformance(session: Session, result_id: int) -> Conformance:
    row = session.get(m.CalloutOutcome, result_id)
    if row is None:
        raise ShopdbError(
            f"result {result_id} has not been judged against its drawing; run 'shopdb db upgrade'"
        )
    return Conformance(
        tuple(FieldOutcome.from_dict(f) for f in row.fields),
        TestField.from_dict(row.test_field),
        tuple(row.blockers or ()),
    )


def judge_values(
    callout: Callout, conformance: Conformance, replaced: dict[str, float]
) -> Conformance:
    """The same conformance with some fields' measured values replaced (a what-if, e.g. the
    sagitta corrected for a reference's predicted drift), judged by the same rule."""
    values: dict[str, float | None] = {f.field: f.measured for f in conformance.fields}
    values.update({k: v for k, v in replaced.items() if k in values})
    budgets = {f.field: f.budget for f in conformance.fields if f.budget is not None}
    rule = DecisionRule.parse(conformance.fields[0].rule) if conformance.fields else None
    fields = tuple(evaluate(callout, values, budgets=budgets, rule=rule))
    return replace(conformance, fields=fields)


def judge_and_record(
    session: Session,
    *,
    measurement: m.Measurement,
    result: m.SurfaceResult,
    values: dict,
    surface: SurfaceMap | None,
    extrema: dict | None = None,
) -> Conformance:
    """Judge a stored result against its part's drawing — its fields with their uncertainty
    budgets as the records stood when it was measured, by the drawing's decision rule — and keep
    the judgement with it. ``values`` is the result in its stored form; ``surface`` the map as
    stored (for a test field); ``extrema`` the analysis' peaks and valleys (for the
    uncertainty of a PV)."""
    from shopdb.services.uncertainty import budgets_for

    part = get_id(session, m.Part, measurement.part_id, "part")
    drawing, callout = drawing_callout(session, part.drawing_id)
    station = get_id(session, m.Station, measurement.station_id, "station")
    cal = (
        session.get(m.ReferenceCalibration, measurement.reference_calibration_id)
        if measurement.reference_calibration_id
        else None
    )
    budgets = budgets_for(
        session,
        station=station,
        when=measurement.measured_at,
        calibration=cal,
        callout=callout,
        clear_aperture_mm=drawing.clear_aperture_mm,
        extrema=extrema,
    )
    conformance = judge_map(
        values,
        callout,
        surface=surface,
        settings=AnalysisSettings.from_dict(result.settings),
        clear_aperture_mm=drawing.clear_aperture_mm,
        min_valid_fraction=drawing.min_valid_fraction,
        budgets=budgets,
        rule=DecisionRule.parse(drawing.decision_rule),
    )
    record(session, result_id=result.id, drawing_id=drawing.id, conformance=conformance)
    return conformance


def backfill(session: Session, blobs: BlobStore) -> int:
    """Judge every result that has no stored conformance yet (results stored before the
    conformance was kept); returns how many were judged."""
    missing = session.exec(
        select(m.SurfaceResult, m.Measurement, m.Part)
        .join(m.Measurement, col(m.Measurement.id) == m.SurfaceResult.measurement_id)
        .join(m.Part, col(m.Part.id) == m.Measurement.part_id)
        .where(~sa.exists().where(col(m.CalloutOutcome.result_id) == col(m.SurfaceResult.id)))
        .order_by(col(m.SurfaceResult.id))
    ).all()
    for res, me, part in missing:
        _, callout = drawing_callout(session, part.drawing_id)
        surface = (
            SurfaceMap(
                blobs.get(me.blob_key).astype(np.float64), me.dx_mm, me.wavelength_nm, "surface"
            )
            if callout.test_field_mm
            else None
        )
        judge_and_record(
            session, measurement=me, result=res, values=res.model_dump(), surface=surface
        )
    return len(missing)


# --- blockers: read when the verdict is asked for ----------------------------------------------


def station_state(
    session: Session, station: m.Station, when: datetime, charts: dict | None = None
) -> str | None:
    """None if the station's check standard was in control for a measurement at ``when``, else why.

    ``charts`` (station name -> check chart) saves recomputing a station's chart per part."""
    from shopdb.services.reads.charts import station_check

    profile = profile_of(station)
    serial = profile.check_standard
    if not serial:
        return (
            f"station {station.name} has no check standard, so its state is unknown "
            "(name one: shopdb add station ... --check-standard SERIAL)"
        )
    charts = {} if charts is None else charts
    if station.name not in charts:
        charts[station.name] = station_check(session=session, station=station.name)
    chart = charts[station.name]
    max_age = timedelta(days=profile.check_max_age_days)
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


def _calibration(session: Session, me: m.Measurement) -> tuple[dict | None, str | None]:
    if me.reference_calibration_id is None:
        return None, "measured without a reference calibration"
    cal = get_id(session, m.ReferenceCalibration, me.reference_calibration_id, "calibration")
    ref = get_id(session, m.ReferenceOptic, cal.reference_id, "reference optic")
    info = {
        "id": cal.id,
        "reference": ref.name,
        "calibrated_at": cal.calibrated_at.isoformat(),
        "valid_until": cal.valid_until.isoformat(),
        "method": cal.method,
        "uncertainty_nm": cal.uncertainty_nm,
    }
    if not cal.calibrated_at <= me.measured_at <= cal.valid_until:
        return info, (
            f"reference {ref.name} calibration {cal.id} was not valid on "
            f"{me.measured_at:%Y-%m-%d} (valid {cal.calibrated_at:%Y-%m-%d} to "
            f"{cal.valid_until:%Y-%m-%d})"
        )
    return info, None


def measurement_verdict(
    session: Session,
    me: m.Measurement,
    *,
    part: m.Part | None = None,
    charts: dict | None = None,
    designated: bool = False,
) -> Verdict:
    """The verdict of one measurement's newest result against its part's drawing."""
    part = part or get_id(session, m.Part, me.part_id, "part")
    drawing = get_id(session, m.Drawing, part.drawing_id, "drawing")
    res = newest_result(session, me.id)
    conf = stored_conformance(session, res.id)
    station = get_id(session, m.Station, me.station_id, "station")
    blocked = list(conf.blocked)
    calibration, why = _calibration(session, me)
    if why:
        blocked.append(why)
    state = station_state(session, station, me.measured_at, charts)
    if state:
        blocked.append(state)
    outcome = "blocked" if blocked else "pass" if conf.conforms else "fail"
    return Verdict(
        outcome,
        conf.fields,
        conf.test_field,
        tuple(blocked),
        part_id=part.id,
        serial=part.serial,
        part_status=part.status,
        measurement_id=me.id,
        result_id=res.id,
        measured_at=me.measured_at.isoformat(),
        station=station.name,
        operator_id=me.operator_id,
        designated=designated,
        calibration=calibration,
        valid_fraction=res.valid_fraction,
        min_valid_fraction=drawing.min_valid_fraction,
    )


def part_verdict(
    session: Session,
    part: m.Part,
    *,
    measurement_id: int | None = None,
    charts: dict | None = None,
) -> Verdict:
    """The verdict of a part: its final measurement (see
    :func:`shopdb.services.lookups.final_measurement`), or the one QA designates."""
    if measurement_id is not None:
        me = session.get(m.Measurement, measurement_id)
        if me is None or me.part_id != part.id:
            raise ShopdbError(f"measurement {measurement_id} is not a measurement of {part.serial}")
        if me.status != "valid":
            raise ShopdbError(f"measurement {measurement_id} is {me.status}, not valid")
        return measurement_verdict(session, me, part=part, charts=charts, designated=True)
    me, why = final_measurement(session, part)
    if me is None:
        drawing = get_id(session, m.Drawing, part.drawing_id, "drawing")
        return Verdict(
            "blocked",
            blocked=(why or "no valid measurement",),
            part_id=part.id,
            serial=part.serial,
            part_status=part.status,
            min_valid_fraction=drawing.min_valid_fraction,
        )
    return measurement_verdict(session, me, part=part, charts=charts)
