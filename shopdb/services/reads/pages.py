"""What each app page shows, as plain data (DataFrames, dicts, arrays): no ORM objects leave here."""

from __future__ import annotations

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlmodel import Session, col, select

from shopdb import models as m
from shopdb import quantities
from shopdb.blobs import BlobStore
from shopdb.errors import NotFound, ShopdbError
from shopdb.services import verdict
from shopdb.services.lookups import (
    CHECK_DRAWING,
    drawing_callout,
    get_by,
    get_id,
    newest_result,
    profile_of,
)
from shopdb.services.reads.charts import metric_frame, part_convergence
from shopdb.surface import zernike

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
STATUS_ORDER = {
    "diverging": 0,
    "stalled": 1,
    "not converging": 2,
    "converging": 3,
    "too few runs": 4,
    "in tolerance": 5,
}


def record_counts(*, session: Session) -> pd.DataFrame:
    """How many records of each kind the shop holds (one COUNT per table, in SQL)."""
    rows = [
        {
            "records": label,
            "count": session.execute(sa.select(sa.func.count()).select_from(model)).scalar_one(),
        }
        for label, model in COUNTED.items()
    ]
    return pd.DataFrame(rows)


def _not_check(column):
    return column.not_in(sa.select(m.Drawing.id).where(m.Drawing.number == CHECK_DRAWING))


def floor_overview(*, session: Session) -> dict:
    """Parts in process (stalled first) with their latest result against the drawing, and
    reference calibrations that are due or overdue (the open signal episodes are
    :func:`shopdb.services.signals.watched`)."""
    now = m.utcnow()
    parts = session.exec(
        select(m.Part)
        .where(col(m.Part.status).in_(["in_process", "rework"]))
        .where(_not_check(col(m.Part.drawing_id)))
    ).all()
    rows = []
    for p in parts:
        info = part_convergence(session=session, serial=p.serial)
        runs = info["per_run"]
        if runs.empty:
            continue
        c = info["convergence"]
        lo, hi = (c.runs_interval or (None, None)) if c else (None, None)
        rows.append(
            {
                "part": p.serial,
                "drawing": info["drawing"],
                "machine": runs["machine"].iloc[-1],
                "iteration": int(runs["iteration"].iloc[-1]),
                "metric": info["metric"],
                "quantity": info["quantity"].label,
                "latest": float(runs["value"].iloc[-1]),
                "tolerance": info["tolerance"],
                "status": c.status if c else "too few runs",
                "runs_to_spec": c.runs_remaining if c else None,
                "interval": None
                if lo is None
                else f"{lo:.0f}–{'never' if hi == float('inf') else f'{hi:.0f}'}",
                "last_measured": runs["measured_at"].iloc[-1],
            }
        )
    wip = pd.DataFrame(rows)
    if not wip.empty:
        wip = wip.sort_values(
            ["status", "part"], key=lambda s: s.map(STATUS_ORDER) if s.name == "status" else s
        )
    refs = []
    for r in session.exec(select(m.ReferenceOptic).order_by(col(m.ReferenceOptic.name))).all():
        cal = session.exec(
            select(m.ReferenceCalibration)
            .where(m.ReferenceCalibration.reference_id == r.id)
            .order_by(col(m.ReferenceCalibration.calibrated_at).desc())
        ).first()
        if cal is None:
            continue
        days = (cal.valid_until - now).days
        refs.append(
            {
                "reference": r.name,
                "last_calibration": cal.calibrated_at,
                "valid_until": cal.valid_until,
                "state": "overdue" if days < 0 else "due soon" if days < 21 else "valid",
                "days_left": days,
            }
        )
    return {"wip": wip, "references": pd.DataFrame(refs)}


def part_history(*, session: Session, serial: str) -> dict:
    """A part's measurements, each with its verdict (from the verdict owner), and its convergence."""
    part = get_by(session, m.Part, "serial", serial, "part serial")
    conv = part_convergence(session=session, serial=serial)
    meas = metric_frame(session=session, metric="rms_nm", part=serial, include_check_standards=True)
    drawing, _ = drawing_callout(session, part.drawing_id)
    charts: dict = {}
    verdicts = [
        verdict.measurement_verdict(
            session, get_id(session, m.Measurement, int(i), "measurement"), part=part, charts=charts
        )
        for i in meas["measurement_id"]
    ]
    results = {
        r.id: r
        for r in session.exec(
            select(m.SurfaceResult).where(
                col(m.SurfaceResult.id).in_(meas["result_id"].astype(int).tolist())
            )
        )
    }
    meas["verdict"] = [v.verdict for v in verdicts]
    meas["reasons"] = ["; ".join(v.reasons) for v in verdicts]
    for column in ("irregularity_nm", "sag_nm"):
        meas[column] = [getattr(results[int(r)], column) for r in meas["result_id"]]
    lot = session.get(m.Lot, part.lot_id) if part.lot_id else None
    return {
        "serial": serial,
        "status": part.status,
        "drawing": drawing.number,
        "title": drawing.title,
        "callout": drawing.surface_form_callout,
        "lot": lot.code if lot else None,
        "measurements": meas.rename(columns={"value": "rms_nm"}),
        "convergence": conv,
    }


def measurement_detail(*, session: Session, blobs: BlobStore | None, measurement_id: int) -> dict:
    """One measurement: its map (None without ``blobs``), result, Zernike terms, PSD bands,
    verdict and provenance."""
    me = get_id(session, m.Measurement, measurement_id, "measurement")
    res = newest_result(session, me.id)
    terms = session.exec(select(m.ZernikeTerm).where(m.ZernikeTerm.result_id == res.id)).all()
    zt = pd.DataFrame(
        [
            {
                "n": t.n,
                "m": t.m,
                "ansi": zernike.nm_to_ansi(t.n, t.m),
                "noll": zernike.nm_to_noll(t.n, t.m),
                "term": zernike.name(t.n, t.m),
                "coef_nm": t.coef_nm,
            }
            for t in terms
        ]
    ).sort_values("ansi")
    part = get_id(session, m.Part, me.part_id, "part")
    run = session.get(m.PolishingRun, me.run_id) if me.run_id else None
    machine = session.get(m.Machine, run.machine_id) if run and run.machine_id else None
    station = get_id(session, m.Station, me.station_id, "station")
    cal = (
        session.get(m.ReferenceCalibration, me.reference_calibration_id)
        if me.reference_calibration_id
        else None
    )
    ref = session.get(m.ReferenceOptic, cal.reference_id) if cal else None
    drawing, _ = drawing_callout(session, part.drawing_id)
    v = verdict.measurement_verdict(session, me, part=part)
    return {
        "id": me.id,
        "part": part.serial,
        "drawing": drawing.number,
        "callout": drawing.surface_form_callout,
        "measured_at": me.measured_at,
        "station": station.name,
        "machine": machine.name if machine else None,
        "iteration": run.iteration if run else None,
        "source_name": me.source_name,
        "sha256": me.source_sha256,
        "blob": me.blob_key,
        "dx_mm": me.dx_mm,
        "wavelength_nm": me.wavelength_nm,
        "status": me.status,
        "reference": f"{ref.name}, calibrated {cal.calibrated_at:%Y-%m-%d}, valid until {cal.valid_until:%Y-%m-%d}"
        if cal and ref
        else None,
        "settings": res.settings,
        "settings_hash": res.settings_hash,
        "software_version": res.software_version,
        "result": {q.name: getattr(res, q.name) for q in quantities.SCALARS},
        "bands": pd.DataFrame(res.psd_bands),
        "zernike": zt,
        "verdict": v,
        "map_nm": None if blobs is None else blobs.get(me.blob_key).astype(np.float64),
    }


def difference(*, session: Session, blobs: BlobStore, before_id: int, after_id: int) -> dict:
    """What was removed between two measurements of one part: before − after, registered on the
    aperture, piston removed (:func:`shopdb.surface.removal.difference`)."""
    from shopdb.surface.removal import difference as registered_difference

    a, b = (get_id(session, m.Measurement, i, "measurement") for i in (before_id, after_id))
    if a.part_id != b.part_id:
        raise ShopdbError(f"measurements {before_id} and {after_id} are of different parts")
    if a.measured_at > b.measured_at:
        a, b = b, a
    try:
        d = registered_difference(
            blobs.get(a.blob_key).astype(float), blobs.get(b.blob_key).astype(float)
        )
    except ValueError as exc:
        raise ShopdbError(f"difference of {a.id} and {b.id}: {exc}") from None
    return {
        "before_id": a.id,
        "after_id": b.id,
        "map_nm": d.map_nm,
        "pv_nm": d.pv_nm,
        "rms_nm": d.rms_nm,
        "shift_rc": d.shift_rc,
        "dx_mm": a.dx_mm,
    }


def part_strip(*, session: Session, blobs: BlobStore, serial: str) -> dict:
    """The part's map after each polishing run (its last measurement after the run started), in
    run order, piston and tilt removed, with one colour range (nm) for all of them: a strip of
    maps on one scale."""
    from shopdb.surface.removal import detrend

    part = get_by(session, m.Part, "serial", serial, "part serial")
    rows = session.exec(
        select(m.Measurement, m.PolishingRun.iteration)
        .outerjoin(m.PolishingRun, col(m.PolishingRun.id) == m.Measurement.run_id)
        .where(m.Measurement.part_id == part.id, m.Measurement.status == "valid")
        .order_by(col(m.Measurement.measured_at))
    ).all()
    last: dict = {}
    for me, iteration in rows:
        last[iteration] = me  # later measurements of a run replace earlier ones
    maps = []
    for it, me in sorted(last.items(), key=lambda kv: (kv[0] is not None, kv[0] or 0)):
        try:
            z = detrend(blobs.get(me.blob_key).astype(np.float64))
        except ValueError:
            continue
        maps.append(
            {
                "iteration": it,
                "measurement_id": me.id,
                "measured_at": me.measured_at,
                "dx_mm": me.dx_mm,
                "map_nm": z,
            }
        )
    lo = min((float(np.nanmin(x["map_nm"])) for x in maps), default=0.0)
    hi = max((float(np.nanmax(x["map_nm"])) for x in maps), default=0.0)
    return {"maps": maps, "lo": lo, "hi": hi}


def find_measurements(
    *,
    session: Session,
    text: str = "",
    drawing: str | None = None,
    start=None,
    end=None,
    limit: int = 50,
) -> pd.DataFrame:
    """Measurements by part serial (a prefix or part of it), drawing and date, newest first,
    with their stored judgement (pass / fail / within U)."""
    me, pa, dr, st, co = m.Measurement, m.Part, m.Drawing, m.Station, m.CalloutOutcome
    sr = m.SurfaceResult
    from shopdb.services.reads._sql import is_newest

    q = (
        sa.select(
            col(me.id),
            col(pa.serial),
            col(dr.number),
            col(me.measured_at),
            col(st.name),
            col(co.passes),
            col(co.conditional),
            col(co.failed_fields),
        )
        .select_from(me)
        .join(pa, col(pa.id) == me.part_id)
        .join(dr, col(dr.id) == pa.drawing_id)
        .join(st, col(st.id) == me.station_id)
        .join(sr, is_newest(session, sr, me))
        .outerjoin(co, col(co.result_id) == sr.id)
        .where(col(me.status) == "valid")
    )
    if text.strip():
        q = q.where(col(pa.serial).ilike(f"%{text.strip()}%"))
    if drawing:
        q = q.where(col(dr.number) == drawing)
    if start is not None:
        q = q.where(col(me.measured_at) >= start)
    if end is not None:
        q = q.where(col(me.measured_at) < end)
    rows = session.execute(q.order_by(col(me.measured_at).desc()).limit(limit)).all()
    out = []
    for mid, serial, number, when, station, passes, conditional, failed in rows:
        state = "pass" if passes else "fail" if passes is not None else "not judged"
        if conditional:
            state += ", within U"
        out.append(
            {
                "measurement_id": mid,
                "part": serial,
                "drawing": number,
                "measured_at": when,
                "station": station,
                "judged": state,
                "failed": ", ".join(
                    quantities.for_field(f).label for f in (failed or "").split(",") if f
                ),
            }
        )
    return pd.DataFrame(
        out,
        columns=["measurement_id", "part", "drawing", "measured_at", "station", "judged", "failed"],
    )


def measurement_x3p(*, session: Session, blobs: BlobStore, measurement_id: int) -> bytes:
    """The stored map of a measurement as an ISO 25178-72 X3P file."""
    from shopdb.formats.x3p import x3p_bytes
    from shopdb.surface.maps import SurfaceMap

    me = get_id(session, m.Measurement, measurement_id, "measurement")
    z = blobs.get(me.blob_key).astype(np.float64)
    return x3p_bytes(
        SurfaceMap(
            z, me.dx_mm, me.wavelength_nm, source={"measured_at": me.measured_at.isoformat()}
        )
    )


def choices(*, session: Session) -> dict:
    """Names for the pages' selectors."""

    def names(column, where=None):
        stmt = sa.select(column).order_by(column)
        if where is not None:
            stmt = stmt.where(where)
        return [r[0] for r in session.execute(stmt).all()]

    return {
        "drawings": names(col(m.Drawing.number), m.Drawing.number != CHECK_DRAWING),
        "machines": names(col(m.Machine.name)),
        "stations": names(col(m.Station.name)),
        "references": names(col(m.ReferenceOptic.name)),
        "parts": names(col(m.Part.serial), _not_check(col(m.Part.drawing_id))),
        # parts that still take measurements (check standards included)
        "measurable_parts": names(
            col(m.Part.serial), col(m.Part.status).not_in(m.CLOSED_PART_STATUSES)
        ),
        "lots": names(col(m.Lot.code)),
    }


def admin_lists(*, session: Session) -> dict:
    """Users (no password data), drawings, stations and machines for the admin page."""

    def table(stmt, columns):
        return pd.DataFrame(session.execute(stmt).all(), columns=columns)

    return {
        "users": table(
            sa.select(
                col(m.User.username), col(m.User.display_name), col(m.User.role), col(m.User.active)
            ).order_by(col(m.User.username)),
            ["user", "printed name", "role", "active"],
        ),
        "drawings": table(
            sa.select(
                col(m.Drawing.number),
                col(m.Drawing.revision),
                col(m.Drawing.title),
                col(m.Drawing.surface_form_callout),
                col(m.Drawing.clear_aperture_mm),
                col(m.Drawing.min_valid_fraction),
            ).order_by(col(m.Drawing.number), col(m.Drawing.revision)),
            ["number", "revision", "title", "callout", "clear aperture (mm)", "min valid fraction"],
        ),
        "stations": pd.DataFrame(
            [
                {
                    "station": st_.name,
                    "instrument": st_.instrument,
                    "wavelength (nm)": st_.wavelength_nm,
                    "requires reference": "yes" if st_.requires_reference else "no",
                    "set-up": profile_of(st_).describe(),
                }
                for st_ in session.exec(select(m.Station).order_by(col(m.Station.name)))
            ],
            columns=["station", "instrument", "wavelength (nm)", "requires reference", "set-up"],
        ),
        "machines": table(
            sa.select(col(m.Machine.name), col(m.Machine.kind), col(m.Machine.notes)).order_by(
                col(m.Machine.name)
            ),
            ["machine", "kind", "notes"],
        ),
    }


def measurement_summary(*, session: Session, ref: str | int) -> dict:
    """One measurement without its map: a measurement id, or a part serial (its latest valid
    measurement)."""
    text = str(ref).strip()
    if text.isdigit():
        me = get_id(session, m.Measurement, int(text), "measurement")
    else:
        part = get_by(session, m.Part, "serial", text, "part serial or measurement id")
        me = session.exec(
            select(m.Measurement)
            .where(m.Measurement.part_id == part.id, m.Measurement.status == "valid")
            .order_by(col(m.Measurement.measured_at).desc())
        ).first()
        if me is None:
            raise NotFound(f"part {text} has no valid measurement")
    d = measurement_detail(session=session, blobs=None, measurement_id=me.id)
    d["zernike"] = d["zernike"].to_dict(orient="records")
    d["bands"] = d["bands"].to_dict(orient="records")
    d["quantities"] = list(quantities.SCALARS)
    return d


def parts_in_process(
    *,
    session: Session,
    status: str | None = None,
    drawing: str | None = None,
    machine: str | None = None,
) -> pd.DataFrame:
    """The floor's parts in process, filtered; with the forecast interval as text."""
    if status is not None and status not in STATUS_ORDER:
        raise ShopdbError(f"--status {status!r}: one of {', '.join(STATUS_ORDER)}")
    wip = floor_overview(session=session)["wip"]
    if wip.empty:
        return wip
    for column, value in (("status", status), ("drawing", drawing), ("machine", machine)):
        if value is not None:
            wip = wip[wip[column] == value]
    return wip
