"""Read-only queries behind the pages and the CLI; each returns plain data (DataFrames, dicts).

Joins and filters run in SQL; one row per measurement, using its newest result.
"""

from __future__ import annotations

import functools
import gc
import json
import math
import operator
from datetime import datetime

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlalchemy.orm import aliased
from sqlmodel import Session, select

from shopdb import models as m
from shopdb.errors import NotFound, ShopdbError
from shopdb.spc import charts, convergence, drift, kpi
from shopdb.spec import RESULT_KEYS, CalloutError, band_index, evaluate, parse

COUNTED = {
    "drawings": m.Drawing,
    "lots": m.Lot,
    "parts": m.Part,
    "polishing runs": m.PolishingRun,
    "measurements": m.Measurement,
    "results": m.SurfaceResult,
    "machines": m.Machine,
    "stations": m.Station,
    "reference optics": m.ReferenceOptic,
    "reference calibrations": m.ReferenceCalibration,
    "users": m.User,
    "audit events": m.AuditEvent,
}
SCALAR_METRICS = (
    "pv_nm",
    "rms_nm",
    "pvr_nm",
    "sag_nm",
    "irregularity_nm",
    "rsi_nm",
    "rmst_nm",
    "rmsi_nm",
    "rmsa_nm",
    "slope_rms_urad",
    "valid_fraction",
)
METRIC_FIELD = {
    "sag_nm": "sag",
    "irregularity_nm": "irregularity",
    "rsi_nm": "rsi",
    "rmst_nm": "rmst",
    "rmsi_nm": "rmsi",
    "rmsa_nm": "rmsa",
    "pvr_nm": "pvr",
    "slope_rms_urad": "slope",
}


def record_counts(*, session: Session) -> pd.DataFrame:
    """How many records of each kind the shop holds (one COUNT per table, in SQL)."""
    rows = [
        {
            "records": label,
            "count": session.exec(sa.select(sa.func.count()).select_from(model)).one()[0],
        }
        for label, model in COUNTED.items()
    ]
    return pd.DataFrame(rows)


def _is_newest(session: Session, result, measurement):
    """Join condition: ``result`` is the newest result of ``measurement``.

    Each database gets the form it plans best on the (measurement_id, id) index: PostgreSQL an
    anti-join (no newer result exists; a hash anti-join), SQLite one ``max(id)`` index probe per
    row. Both mean the same rows."""
    s2 = aliased(m.SurfaceResult)
    same = result.measurement_id == measurement.id
    if session.get_bind().dialect.name == "postgresql":
        newer = sa.exists().where(s2.measurement_id == result.measurement_id, s2.id > result.id)
        return sa.and_(same, ~newer)
    newest = sa.select(sa.func.max(s2.id)).where(s2.measurement_id == measurement.id)
    return sa.and_(same, result.id == newest.scalar_subquery())


def newest_result(session: Session, measurement_id: int) -> m.SurfaceResult | None:
    """The measurement's newest result (reanalysis adds results; the newest is the one in use)."""
    return session.exec(
        select(m.SurfaceResult)
        .where(m.SurfaceResult.measurement_id == measurement_id)
        .order_by(m.SurfaceResult.id.desc())
    ).first()


def check_metric(metric: str) -> None:
    if metric in SCALAR_METRICS or metric.startswith(("z:", "band:")):
        return
    raise ShopdbError(
        f"unknown metric {metric!r}: one of {', '.join(SCALAR_METRICS)}, z:N,M or band:K"
    )


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
    params, value (of its newest result)."""
    check_metric(metric)
    sr, me, pa, dr, ru, mc, st = (
        m.SurfaceResult,
        m.Measurement,
        m.Part,
        m.Drawing,
        m.PolishingRun,
        m.Machine,
        m.Station,
    )
    # measured_at and run params come back raw (see _raw_time; params as JSON text) and are
    # converted once per column below, not once per row by the ORM types
    cols = [
        me.id.label("measurement_id"),
        sr.id.label("result_id"),
        _raw_time(session, me.measured_at).label("measured_at"),
        pa.serial.label("part"),
        dr.number.label("drawing"),
        mc.name.label("machine"),
        st.name.label("station"),
        ru.iteration,
        sa.cast(ru.params, sa.Text).label("run_params"),
        me.reference_calibration_id,
    ]
    q = (
        sa.select(*cols)
        .select_from(me)
        .join(sr, _is_newest(session, sr, me))
        .join(pa, pa.id == me.part_id)
        .join(dr, dr.id == pa.drawing_id)
        .join(st, st.id == me.station_id)
        .outerjoin(ru, ru.id == me.run_id)
        .outerjoin(mc, mc.id == ru.machine_id)
        .where(me.status == "valid")
    )
    if metric.startswith("z:"):
        try:
            n, mm = (int(v) for v in metric[2:].split(","))
        except ValueError:
            raise ShopdbError(f"Zernike metric {metric!r} must be z:N,M") from None
        zt = m.ZernikeTerm
        q = q.add_columns(zt.coef_nm.label("value")).join(
            zt, sa.and_(zt.result_id == sr.id, zt.n == n, zt.m == mm)
        )
    elif metric.startswith("band:"):
        q = q.add_columns(sr.psd_bands.label("bands"))
    else:
        q = q.add_columns(getattr(sr, metric).label("value"))
    for col, val in (
        (dr.number, drawing),
        (mc.name, machine),
        (st.name, station),
        (pa.serial, part),
    ):
        if val is not None:
            q = q.where(col == val)
    if start is not None:
        q = q.where(me.measured_at >= start)
    if end is not None:
        q = q.where(me.measured_at < end)
    if not include_check_standards:
        q = q.where(dr.number != CHECK_DRAWING)
    df = _frame(
        session,
        q.order_by(me.measured_at, me.id),
        [c.name for c in cols] + (["bands"] if metric.startswith("band:") else ["value"]),
    )
    if not df.empty:
        # JSON text, parsed once per distinct value (runs share few parameter sets)
        params_of = functools.cache(json.loads)
        df["run_params"] = [
            params_of(p) if isinstance(p, str) else p for p in df["run_params"].tolist()
        ]
    if metric.startswith("band:") and not df.empty:
        k = int(metric[5:]) - 1
        bands = [json.loads(b) if isinstance(b, str) else b for b in df.pop("bands")]
        df["value"] = [b[k]["rms_nm"] if b and k < len(b) else math.nan for b in bands]
    elif metric.startswith("band:"):
        df = df.drop(columns=["bands"]).assign(value=[])
    if not df.empty:
        df["measured_at"] = _utc(df["measured_at"])
    return df


CHECK_DRAWING = "CHECK-STANDARD"  # drawing number of station check artefacts


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
    Columns: the chart's per-point columns plus ``group``, ``measurement_id``, ``part``, ``measured_at``.
    """
    if chart not in charts.CHARTS:
        raise ShopdbError(f"chart {chart!r} is not one of {', '.join(charts.CHARTS)}")
    if by not in (None, "machine", "station", "drawing"):
        raise ShopdbError(f"--by {by!r}: group by machine, station or drawing")
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
        if chart == "imr":
            t = charts.individuals(
                values,
                times=g["measured_at"].tolist(),
                phases=phases,
                baseline=baseline,
                rule_set=rule_set,
            )
        elif chart == "ewma":
            t = charts.ewma(values, times=g["measured_at"].tolist(), baseline=baseline)
        else:
            base = charts.individuals(values[: baseline or len(values)])
            t = charts.cusum(
                values,
                target=float(base["centre"].iloc[0]),
                sigma=float(base["sigma"].iloc[0]),
                times=g["measured_at"].tolist(),
            )
        t.insert(0, "group", name)
        t["measurement_id"] = g["measurement_id"].to_numpy()
        t["part"] = g["part"].to_numpy()
        t["measured_at"] = g["measured_at"].to_numpy()
        out.append(t)
    return pd.concat(out, ignore_index=True) if out else pd.DataFrame()


def callout_lookup(session: Session):
    """drawing id -> parsed callout, parsing each drawing once per query."""
    return functools.cache(lambda drawing_id: drawing_callout(session, drawing_id)[1])


def drawing_callout(session: Session, drawing_id: int):
    d = session.get(m.Drawing, drawing_id)
    try:
        return d, parse(d.surface_form_callout, default_wavelength_nm=d.test_wavelength_nm)
    except CalloutError as exc:
        raise ShopdbError(f"drawing {d.number}: {exc}") from None


def part_convergence(*, session: Session, serial: str, metric: str | None = None) -> dict:
    """The part's metric per polishing iteration (its last measurement after each run), the fitted
    convergence and the forecast of further runs to the drawing's tolerance for that metric."""
    part = session.exec(select(m.Part).where(m.Part.serial == serial)).first()
    if part is None:
        raise NotFound(f"unknown part serial {serial!r}")
    drawing, callout = drawing_callout(session, part.drawing_id)
    if metric is None:
        metric = next(
            (
                k
                for k, f in METRIC_FIELD.items()
                if callout.limit_nm(f) is not None and k != "sag_nm"
            ),
            "rms_nm",
        )
    df = metric_frame(session=session, metric=metric, part=serial)
    df = df[df["iteration"].notna()]
    per_run = df.sort_values("measured_at").groupby("iteration", as_index=False).last()
    tol = callout.limit_nm(METRIC_FIELD.get(metric, "")) if metric in METRIC_FIELD else None
    values = per_run["value"].abs().to_numpy(float)
    result = (
        convergence.analyse(per_run["iteration"].to_numpy(float), values, tolerance=tol)
        if len(values)
        else None
    )
    return {
        "part": serial,
        "drawing": drawing.number,
        "metric": metric,
        "tolerance": tol,
        "per_run": per_run[["iteration", "measurement_id", "measured_at", "machine", "value"]],
        "convergence": result,
    }


def reference_drift(
    *,
    session: Session,
    reference: str,
    term: str = "2,0",
    threshold_nm: float | None = None,
    now: datetime | None = None,
) -> dict:
    """Drift of one calibrated quantity of a reference optic: ``term`` "n,m", "pv" or "rms"."""
    ref = session.exec(select(m.ReferenceOptic).where(m.ReferenceOptic.name == reference)).first()
    if ref is None:
        raise NotFound(f"unknown reference optic {reference!r}")
    cals = session.exec(
        select(m.ReferenceCalibration)
        .where(m.ReferenceCalibration.reference_id == ref.id)
        .order_by(m.ReferenceCalibration.calibrated_at)
    ).all()
    rows = []
    for c in cals:
        v = c.pv_nm if term == "pv" else c.rms_nm if term == "rms" else c.coefficients.get(term)
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
    table = pd.DataFrame(rows)
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
    """Measurements made with the reference since its last calibration whose verdict would change if
    the reference's predicted power drift were subtracted (power of the reference adds to the
    measured sag: 2 sqrt(3) c(2,0), shared/REFERENCES.md)."""
    info = reference_drift(session=session, reference=reference, term="2,0", now=now)
    fit, last = info["drift"], info["last_calibration"]
    if fit is None or last is None:
        return pd.DataFrame(columns=IMPACT_COLUMNS)
    ref = session.exec(select(m.ReferenceOptic).where(m.ReferenceOptic.name == reference)).first()
    q = (
        sa.select(
            m.Measurement.id,
            m.Measurement.measured_at,
            m.Part.serial,
            m.Part.drawing_id,
            m.Lot.code,
            m.Lot.status,
            m.SurfaceResult,
        )
        .join(
            m.ReferenceCalibration,
            m.ReferenceCalibration.id == m.Measurement.reference_calibration_id,
        )
        .join(m.Part, m.Part.id == m.Measurement.part_id)
        .outerjoin(m.Lot, m.Lot.id == m.Part.lot_id)
        .join(m.SurfaceResult, m.SurfaceResult.measurement_id == m.Measurement.id)
        .where(
            m.ReferenceCalibration.reference_id == ref.id,
            m.Measurement.measured_at >= last,
            m.Measurement.status == "valid",
        )
        .order_by(m.Measurement.measured_at)
    )
    rows = []
    callout_of = callout_lookup(session)
    rate_per_day = fit.rate_per_month / drift.DAYS_PER_MONTH
    for mid, when, serial, did, lot, lot_status, res in session.execute(q).all():
        c = callout_of(did)
        r = res.model_dump()
        ok = all(v.passed for v in evaluate(c, r))
        delta_c20 = rate_per_day * (when - last).total_seconds() / 86400
        corrected = {**r, "sag_nm": r["sag_nm"] - 2 * math.sqrt(3) * delta_c20}
        ok2 = all(v.passed for v in evaluate(c, corrected))
        if ok != ok2:
            rows.append(
                {
                    "measurement_id": mid,
                    "part": serial,
                    "lot": lot,
                    "lot_status": lot_status,
                    "measured_at": when,
                    "verdict": "pass" if ok else "fail",
                    "verdict_if_corrected": "pass" if ok2 else "fail",
                }
            )
    return pd.DataFrame(rows, columns=IMPACT_COLUMNS)


def _raw_time(session: Session, column):
    """A timestamp column as the cheapest raw value to read in bulk: SQLite's stored ISO text,
    PostgreSQL's epoch seconds as a double (psycopg's datetime objects cost more to make and to
    convert than the query itself). :func:`_utc` turns either into UTC timestamps."""
    if session.get_bind().dialect.name == "postgresql":
        return sa.cast(sa.extract("epoch", column), sa.Float)
    return sa.type_coerce(column, sa.String)


def _utc(values: pd.Series) -> pd.Series:
    """UTC timestamps from :func:`_raw_time` values, in one vectorised pass."""
    if len(values) and isinstance(values.iloc[0], str):
        return pd.to_datetime(values, utc=True, format="ISO8601")
    if len(values) and isinstance(values.iloc[0], float | np.floating):
        return pd.to_datetime(values, unit="s", utc=True).dt.round("us")
    return pd.to_datetime(values, utc=True)


def _frame(session: Session, stmt, columns: list[str], index: str | None = None) -> pd.DataFrame:
    """A large read as a DataFrame, from the driver's own tuples (no per-row SQLAlchemy processing).

    The cyclic garbage collector is paused until the tuples are gone: 100,000 rows are half a
    million new objects, none of them in a reference cycle, and every collection their allocation
    triggers scans the whole process (in the app's process 100-250 ms of one KPI query)."""
    paused, rows = gc.isenabled(), []
    gc.disable()
    try:
        result = session.connection().execute(stmt)
        try:
            rows = result.cursor.fetchall()
        finally:
            result.close()
        return pd.DataFrame.from_records(rows, columns=columns, index=index)
    finally:
        del rows
        if paused:
            gc.enable()


def _callout_failures(session: Session, result, drawing) -> tuple[list[str], sa.ColumnElement]:
    """The callout fields of all drawings, and a SQL expression: the bit mask (bit k = field k)
    of the fields the row's result fails under its drawing's callout, by the rule of
    :func:`shopdb.spec.evaluate` (magnitude over the limit, or no value: a NULL or NaN compares
    false)."""
    fields: list[str] = []
    whens = []
    for drawing_id in session.exec(select(m.Drawing.id)).all():
        callout = drawing_callout(session, drawing_id)[1]
        terms = []
        for lim in (*callout.limits, *callout.extras):
            if lim.field not in fields:
                fields.append(lim.field)
            if lim.field.startswith("band"):
                value = result.psd_bands[(band_index(lim.field), "rms_nm")].as_float()
            else:
                value = getattr(result, RESULT_KEYS[lim.field])
            bit = 1 << fields.index(lim.field)
            ok = sa.func.abs(value) <= lim.nm(callout.wavelength_nm)
            terms.append(sa.case((ok, 0), else_=bit))
        if terms:
            whens.append((drawing == drawing_id, functools.reduce(operator.add, terms)))
    return fields, (sa.case(*whens, else_=0) if whens else sa.literal(0))


def part_outcomes(
    *,
    session: Session,
    start: datetime | None = None,
    end: datetime | None = None,
    by: str = "month",
) -> pd.DataFrame:
    """Per part that reached a final inspection: the outcome columns of :mod:`shopdb.spc.kpi`.

    A part's first final inspection is its last measurement before its first rework run (a run
    whose parameters say ``"rework": true``), or its last measurement if it had none; first pass =
    that measurement meets every callout field and the part was neither reworked nor scrapped.
    The callouts are judged in SQL (a bit mask per measurement) and the runs aggregated there;
    the per-part reduction is a few grouped passes over integer columns (a window function in SQL
    cost more than the whole reduction does here).
    """
    if by not in ("month", "week", "drawing", "machine"):
        raise ShopdbError(f"--by {by!r}: month, week, drawing or machine")
    sr, me, pa, ru = m.SurfaceResult, m.Measurement, m.Part, m.PolishingRun
    fields, fails = _callout_failures(session, sr, pa.drawing_id)
    check_ids = sa.select(m.Drawing.id).where(m.Drawing.number == CHECK_DRAWING)
    stmt = (
        sa.select(
            me.part_id, ru.iteration, ru.machine_id, _raw_time(session, me.measured_at), fails
        )
        .select_from(me)
        .join(sr, _is_newest(session, sr, me))
        .join(pa, pa.id == me.part_id)
        .outerjoin(ru, ru.id == me.run_id)
        .where(me.status == "valid", pa.status != "in_process", pa.drawing_id.not_in(check_ids))
    )
    if start is not None:
        stmt = stmt.where(me.measured_at >= start)
    if end is not None:
        stmt = stmt.where(me.measured_at < end)
    df = _frame(
        session,
        stmt.order_by(me.measured_at, me.id),
        ["part_id", "iteration", "machine_id", "t", "fails"],
    )
    if df.empty:
        return pd.DataFrame(columns=list(kpi.COLUMNS))
    df["iteration"] = df["iteration"].astype(float)  # NaN: a measurement outside any run
    # runs, aggregated in SQL: each part's first start, first rework iteration and rework count
    rework = ru.params["rework"].as_boolean().is_(True)
    runs = _frame(
        session,
        sa.select(
            ru.part_id,
            _raw_time(session, sa.func.min(ru.started_at)),
            sa.func.min(sa.case((rework, ru.iteration))),
            sa.func.count(sa.case((rework, 1))),
        ).group_by(ru.part_id),
        ["part_id", "started_at", "first_rework", "reworks"],
        index="part_id",
    )
    limit = df["part_id"].map(runs["first_rework"].astype(float))
    eligible = limit.isna() | (df["iteration"] < limit)  # no run (NaN): not before a rework
    final = df[eligible].groupby("part_id").tail(1).set_index("part_id")  # rows are time-ordered
    seen = df.groupby("part_id")["t"]
    first_seen, last_seen = seen.first().reindex(final.index), seen.last().reindex(final.index)
    iterations = df[df["fails"] == 0].groupby("part_id")["iteration"].min().reindex(final.index)
    parts = _frame(
        session,
        sa.select(pa.id, pa.serial, pa.status, pa.drawing_id),
        ["part_id", "serial", "status", "drawing_id"],
        index="part_id",
    ).reindex(final.index)
    when = _utc(final["t"])
    if by in ("drawing", "machine"):
        model = m.Drawing if by == "drawing" else m.Machine
        label = model.number if by == "drawing" else model.name
        names_of = dict(session.execute(sa.select(model.id, label)).all())
        group = final["machine_id"] if by == "machine" else parts["drawing_id"]
        group = group.map(names_of).fillna("(none)")
    else:
        group = when.dt.strftime("%Y-%m" if by == "month" else "%G-W%V")
    bits = final["fails"].to_numpy()
    names = {b: [f for k, f in enumerate(fields) if b >> k & 1] for b in set(bits.tolist())}
    reworks = runs["reworks"].reindex(final.index).fillna(0).astype(int).to_numpy()
    scrapped = (parts["status"] == "scrapped").to_numpy()
    start_t = _utc(runs["started_at"].reindex(final.index).fillna(first_seen))
    out = pd.DataFrame(
        {
            "part": parts["serial"].to_numpy(),
            "group": group.to_numpy(),
            "first_pass": (bits == 0) & (reworks == 0) & ~scrapped,
            "reworks": reworks,
            "scrapped": scrapped,
            "iterations": iterations.to_numpy(float),
            "cycle_days": ((_utc(last_seen) - start_t).dt.total_seconds() / 86400).to_numpy(),
            "failed_fields": [list(names[b]) for b in bits.tolist()],
        }
    )
    return out.sort_values("part", kind="stable", ignore_index=True)[list(kpi.COLUMNS)]


def kpi_table(
    *,
    session: Session,
    start: datetime | None = None,
    end: datetime | None = None,
    by: str = "month",
) -> tuple[pd.DataFrame, pd.DataFrame]:
    outcomes = part_outcomes(session=session, start=start, end=end, by=by)
    return kpi.kpis(outcomes), kpi.pareto(outcomes)


def station_check(*, session: Session, station: str) -> pd.DataFrame:
    """Individuals chart of the station's check standard (its RMS), one point per measurement."""
    st = session.exec(select(m.Station).where(m.Station.name == station)).first()
    if st is None:
        raise NotFound(f"unknown station {station!r}")
    serial = st.profile.get("check_standard")
    if not serial:
        raise ShopdbError(f"station {station} has no check standard in its profile")
    df = metric_frame(
        session=session, metric="rms_nm", part=serial, station=station, include_check_standards=True
    )
    if len(df) < 2:
        return pd.DataFrame()
    t = charts.individuals(
        df["value"].to_numpy(float), times=df["measured_at"].tolist(), baseline=20
    )
    t["measurement_id"] = df["measurement_id"].to_numpy()
    t["measured_at"] = df["measured_at"].to_numpy()
    return t
