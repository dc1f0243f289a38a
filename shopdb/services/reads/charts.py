"""Process reads: a metric per measurement, control charts, the check-standard chart of a station,
a part's run-to-run convergence, and capability of a drawing's finished parts."""

from __future__ import annotations

import functools
import json
import math
from datetime import datetime
from typing import TYPE_CHECKING

import pandas as pd
import sqlalchemy as sa
from sqlmodel import Session, col, select

from shopdb import models as m
from shopdb import quantities
from shopdb.errors import NotFound, ShopdbError
from shopdb.quantities import MetricError, Quantity
from shopdb.services.lookups import CHECK_DRAWING, drawing_callout, get_by, profile_of
from shopdb.services.reads._sql import frame, is_newest, raw_time, utc
from shopdb.spc import charts
from shopdb.spec import fields_of

if TYPE_CHECKING:
    from shopdb.spc.capability import Capability

GROUPINGS = ("machine", "station", "drawing")


def quantity_of(text: str) -> Quantity:
    """The quantity a ``--metric`` (or picker) names; a one-line error otherwise."""
    try:
        return quantities.parse_metric(text)
    except MetricError as exc:
        raise ShopdbError(str(exc)) from None


def metric_frame(
    *,
    session: Session,
    metric: str,
    drawing: str | None = None,
    machine: str | None = None,
    station: str | None = None,
    part: str | None = None,
    start: datetime | None = None,
    end: datetime | None = None,
    include_check_standards: bool = False,
) -> pd.DataFrame:
    """One row per valid measurement: ids, time, part, drawing, machine, station, iteration, run
    params, value (of its newest result, whole aperture)."""
    q = quantity_of(metric)
    sr, me, pa, dr, ru, mc, st = (
        m.SurfaceResult,
        m.Measurement,
        m.Part,
        m.Drawing,
        m.PolishingRun,
        m.Machine,
        m.Station,
    )
    # measured_at and run params come back raw (see raw_time; params as JSON text) and are
    # converted once per column below, not once per row by the ORM types
    cols = [
        col(me.id).label("measurement_id"),
        col(sr.id).label("result_id"),
        raw_time(session, me.measured_at).label("measured_at"),
        col(pa.serial).label("part"),
        col(dr.number).label("drawing"),
        col(mc.name).label("machine"),
        col(st.name).label("station"),
        col(ru.iteration),
        sa.cast(ru.params, sa.Text).label("run_params"),
        col(me.reference_calibration_id),
    ]
    stmt = (
        sa.select(*cols)
        .select_from(me)
        .join(sr, is_newest(session, sr, me))
        .join(pa, col(pa.id) == me.part_id)
        .join(dr, col(dr.id) == pa.drawing_id)
        .join(st, col(st.id) == me.station_id)
        .outerjoin(ru, col(ru.id) == me.run_id)
        .outerjoin(mc, col(mc.id) == ru.machine_id)
        .where(col(me.status) == "valid")
    )
    if q.family == "zernike":
        zt = m.ZernikeTerm
        stmt = stmt.add_columns(col(zt.coef_nm).label("value")).join(
            zt, sa.and_(col(zt.result_id) == sr.id, col(zt.n) == q.n, col(zt.m) == q.m)
        )
    elif q.family == "band":
        stmt = stmt.add_columns(col(sr.psd_bands).label("bands"))
    else:
        stmt = stmt.add_columns(getattr(sr, q.name).label("value"))
    for column, val in ((dr.number, drawing), (mc.name, machine), (st.name, station)):
        if val is not None:
            stmt = stmt.where(col(column) == val)
    if part is not None:
        stmt = stmt.where(col(pa.serial) == part)
    if start is not None:
        stmt = stmt.where(col(me.measured_at) >= start)
    if end is not None:
        stmt = stmt.where(col(me.measured_at) < end)
    if not include_check_standards:
        stmt = stmt.where(col(dr.number) != CHECK_DRAWING)
    band = q.family == "band"
    df = frame(
        session,
        stmt.order_by(col(me.measured_at), col(me.id)),
        [c.name for c in cols] + (["bands"] if band else ["value"]),
    )
    if not df.empty:
        # JSON text, parsed once per distinct value (runs share few parameter sets)
        params_of = functools.cache(json.loads)
        df["run_params"] = [
            params_of(p) if isinstance(p, str) else p for p in df["run_params"].tolist()
        ]
        df["measured_at"] = utc(df["measured_at"])
    if band:
        k = (q.band or 1) - 1
        bands = [json.loads(b) if isinstance(b, str) else b for b in df.pop("bands")]
        df["value"] = [b[k]["rms_nm"] if b and k < len(b) else math.nan for b in bands]
    return df


def _convergence():
    from shopdb.spc import convergence  # scipy.optimize: only for a part's convergence

    return convergence


def control_chart(
    *,
    session: Session,
    metric: str,
    drawing: str | None = None,
    by: str | None = None,
    chart: str = "imr",
    phase_by: str | None = None,
    start: datetime | None = None,
    end: datetime | None = None,
    baseline: int | None = 20,
    rule_set: str = "nelson",
    station: str | None = None,
    include_check_standards: bool = False,
) -> pd.DataFrame:
    """Per-point chart table for one metric, one chart per group (``by`` machine, station or drawing).

    ``phase_by`` names a polishing-run parameter (e.g. ``pad``) whose change starts a new phase.
    Columns: the chart's per-point columns plus ``group``, ``measurement_id``, ``part``,
    ``measured_at``, ``run_params`` and ``change`` (:func:`run_changes`). For a quantity that cannot be negative (PV, RMS, band RMS:
    ``Quantity.non_negative``) a lower limit below zero is set to zero, as is common practice for
    a bounded statistic (Montgomery, Introduction to Statistical Quality Control, §6.2: a
    negative LCL is taken as zero); the chart is then one-sided from below.
    """
    if chart not in charts.CHARTS:
        raise ShopdbError(f"chart {chart!r} is not one of {', '.join(charts.CHARTS)}")
    if by not in (None, *GROUPINGS):
        raise ShopdbError(f"--by {by!r}: group by {', '.join(GROUPINGS)}")
    df = metric_frame(
        session=session,
        metric=metric,
        drawing=drawing,
        start=start,
        end=end,
        station=station,
        include_check_standards=include_check_standards,
    )
    df = df[df["value"].notna()]
    if by == "machine":
        df = df[df["machine"].notna()]  # a machine's chart holds the measurements after its runs
    out = []
    groups = df.groupby(df[by].fillna("(none)")) if by else [("all", df)]
    for name, g in groups:
        if len(g) < 2:
            continue
        phases = None
        if phase_by:
            phases = [
                (p or {}).get(phase_by, "-") if isinstance(p, dict) else "-"
                for p in g["run_params"]
            ]
        values = g["value"].to_numpy(float)
        times = g["measured_at"].tolist()
        if chart == "imr":
            t = charts.individuals(
                values, times=times, phases=phases, baseline=baseline, rule_set=rule_set
            )
        elif chart == "ewma":
            t = charts.ewma(values, times=times, baseline=baseline)
        else:
            base = charts.individuals(values[: baseline or len(values)])
            t = charts.cusum(
                values,
                target=float(base["centre"].iloc[0]),
                sigma=float(base["sigma"].iloc[0]),
                times=times,
            )
        t.insert(0, "group", name)
        t["measurement_id"] = g["measurement_id"].to_numpy()
        t["part"] = g["part"].to_numpy()
        t["measured_at"] = g["measured_at"].to_numpy()
        t["run_params"] = g["run_params"].to_numpy()
        t["change"] = run_changes(g["run_params"].tolist())
        out.append(t)
    if not out:
        return pd.DataFrame()
    table = pd.concat(out, ignore_index=True)
    if quantity_of(metric).non_negative:
        table["lcl"] = table["lcl"].clip(lower=0.0)
    return table


def run_changes(params: list) -> list[str]:
    """Per point, the named run parameters (text-valued ones such as the pad, not the dwell)
    that differ from the previous point's: ``"pad P-17 → P-18"``, else ``""``.

    >>> run_changes([{"pad": "A", "dwell_min": 5}, {"pad": "A", "dwell_min": 7}, {"pad": "B"}])
    ['', '', 'pad A → B']
    """
    out: list[str] = []
    before: dict = {}
    for i, p in enumerate(params):
        now = {k: v for k, v in (p if isinstance(p, dict) else {}).items() if isinstance(v, str)}
        out.append(
            "; ".join(
                f"{k} {before[k]} → {v}"
                for k, v in sorted(now.items())
                if i and k in before and before[k] != v
            )
        )
        before = now
    return out


def station_check(*, session: Session, station: str, metric: str = "rms_nm") -> pd.DataFrame:
    """Individuals chart of a quantity of the station's check standard (RMS by default), one point
    per measurement; empty with fewer than two."""
    st = get_by(session, m.Station, "name", station, "station")
    serial = profile_of(st).check_standard
    if not serial:
        raise ShopdbError(
            f"station {station} has no check standard (shopdb add station ... --check-standard)"
        )
    df = metric_frame(
        session=session, metric=metric, part=serial, station=station, include_check_standards=True
    )
    if len(df) < 2:
        return pd.DataFrame()
    t = charts.individuals(
        df["value"].to_numpy(float), times=df["measured_at"].tolist(), baseline=20
    )
    t["measurement_id"] = df["measurement_id"].to_numpy()
    t["measured_at"] = df["measured_at"].to_numpy()
    return t


def judged_values(session: Session, result_ids: list[int], field: str) -> dict[int, float | None]:
    """Result id -> the measured value of one callout field as the verdict judged it (worst
    test-field sub-aperture where the callout has one)."""
    rows = session.exec(
        select(m.CalloutOutcome.result_id, m.CalloutOutcome.fields).where(
            col(m.CalloutOutcome.result_id).in_(result_ids)
        )
    ).all()
    out: dict[int, float | None] = {}
    for rid, fields in rows:
        fields = json.loads(fields) if isinstance(fields, str) else fields
        out[rid] = next((f["measured"] for f in fields if f["field"] == field), None)
    return out


def part_convergence(*, session: Session, serial: str, metric: str | None = None) -> dict:
    """The part's metric per polishing iteration (its last measurement after each run), the fitted
    convergence and the forecast of further runs to the drawing's tolerance for that metric.

    The default metric is the first field the drawing limits other than the sagitta (which a
    lead corrects separately), else RMS. A metric the callout limits is taken as the verdict
    judged it (the worst test-field sub-aperture where the callout has one), so "in tolerance"
    here agrees with the part's verdict."""
    part = get_by(session, m.Part, "serial", serial, "part serial")
    drawing, callout = drawing_callout(session, part.drawing_id)
    if metric is None:
        metric = next(
            (quantities.for_field(f).name for f in fields_of(callout) if f != "sag"), "rms_nm"
        )
    q = quantity_of(metric)
    df = metric_frame(session=session, metric=metric, part=serial, include_check_standards=True)
    df = df[df["iteration"].notna()]
    per_run = df.sort_values("measured_at").groupby("iteration", as_index=False).last()
    tol = callout.limit_nm(q.callout_field) if q.callout_field else None
    if tol is not None and not per_run.empty:
        judged = judged_values(session, per_run["result_id"].astype(int).tolist(), q.callout_field)
        per_run["value"] = [
            v if judged.get(int(r)) is None else judged[int(r)]
            for r, v in zip(per_run["result_id"], per_run["value"], strict=True)
        ]
    values = per_run["value"].abs().to_numpy(float)
    result = (
        _convergence().analyse(per_run["iteration"].to_numpy(float), values, tolerance=tol)
        if len(values)
        else None
    )
    return {
        "part": serial,
        "drawing": drawing.number,
        "metric": metric,
        "quantity": q,
        "tolerance": tol,
        "per_run": per_run[["iteration", "measurement_id", "measured_at", "machine", "value"]],
        "convergence": result,
    }


def finished_capability(
    *, session: Session, metric: str, drawing: str, usl: float, lsl: float | None = None
) -> Capability:
    """Capability of a metric over the drawing's parts, one value per part: its last measurement."""
    df = metric_frame(session=session, metric=metric, drawing=drawing)
    if df.empty:
        raise NotFound(f"no measurements of drawing {drawing}")
    finals = df.sort_values("measured_at").groupby("part").last()
    try:
        from shopdb.spc import capability as cap  # scipy.stats: only when asked

        return cap.capability(finals["value"].abs().to_numpy(float), usl=usl, lsl=lsl)
    except ValueError as exc:
        raise ShopdbError(f"capability: {exc}") from None


def chart_quantities(*, session: Session, drawing: str | None = None) -> list[Quantity]:
    """What a control chart can show for a drawing: the chartable quantities of the catalogue,
    each PSD band of the drawing's newest result (labelled with its periods), and the Zernike
    terms of astigmatism, coma and spherical aberration."""
    q = select(m.SurfaceResult.psd_bands).join(
        m.Measurement, col(m.Measurement.id) == m.SurfaceResult.measurement_id
    )
    if drawing is not None:
        q = (
            q.join(m.Part, col(m.Part.id) == m.Measurement.part_id)
            .join(m.Drawing, col(m.Drawing.id) == m.Part.drawing_id)
            .where(m.Drawing.number == drawing)
        )
    bands = session.exec(q.order_by(col(m.SurfaceResult.id).desc()).limit(1)).first() or []
    edges = tuple(b["low_per_mm"] for b in bands) + ((bands[-1]["high_per_mm"],) if bands else ())
    out = quantities.chart_choices(len(bands), edges)
    out += [
        quantities.zernike_quantity(n, k) for n, k in ((2, 2), (2, -2), (3, 1), (3, -1), (4, 0))
    ]
    return out
