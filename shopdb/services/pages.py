"""What each app page shows, as plain data (DataFrames, dicts, arrays): no ORM objects leave here."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlmodel import Session, select

from shopdb import models as m
from shopdb.blobs import BlobStore
from shopdb.errors import NotFound
from shopdb.services import queries as q
from shopdb.spec import evaluate
from shopdb.surface import zernike


def floor_overview(*, session: Session) -> dict:
    """Parts in process (stalled first) with their latest result against the drawing, recent
    out-of-control signals by machine, and reference calibrations that are due or overdue."""
    now = m.utcnow()
    parts = session.exec(
        select(m.Part)
        .where(m.Part.status.in_(["in_process", "rework"]))
        .where(
            m.Part.drawing_id.not_in(
                sa.select(m.Drawing.id).where(m.Drawing.number == q.CHECK_DRAWING)
            )
        )
    ).all()
    rows = []
    for p in parts:
        info = q.part_convergence(session=session, serial=p.serial)
        runs = info["per_run"]
        if runs.empty:
            continue
        c = info["convergence"]
        rows.append(
            {
                "part": p.serial,
                "drawing": info["drawing"],
                "machine": runs["machine"].iloc[-1],
                "iteration": int(runs["iteration"].iloc[-1]),
                "metric": info["metric"],
                "latest": float(runs["value"].iloc[-1]),
                "tolerance": info["tolerance"],
                "status": c.status if c else "too few runs",
                "runs_to_spec": c.runs_remaining if c else None,
                "last_measured": runs["measured_at"].iloc[-1],
            }
        )
    order = {
        "diverging": 0,
        "stalled": 1,
        "not converging": 2,
        "converging": 3,
        "too few runs": 4,
        "in tolerance": 5,
    }
    wip = pd.DataFrame(rows)
    if not wip.empty:
        wip = wip.sort_values(
            ["status", "part"], key=lambda s: s.map(order) if s.name == "status" else s
        )
    signals = []
    last = session.exec(sa.select(sa.func.max(m.Measurement.measured_at))).one()[0]
    if last is not None:
        since = last - timedelta(days=60)
        for metric, label in (("band:3", "mid-spatial band"), ("rms_nm", "RMS")):
            t = q.control_chart(session=session, metric=metric, by="machine", baseline=20)
            if t.empty:
                continue
            t = t[
                (pd.to_datetime(t["measured_at"], utc=True) >= pd.Timestamp(since))
                & (t["rules"].map(len) > 0)
            ]
            for g, gt in t.groupby("group"):
                signals.append(
                    {
                        "machine": g,
                        "metric": label,
                        "signals": len(gt),
                        "latest": gt["measured_at"].max(),
                        "what": gt["explanation"].iloc[-1],
                        "measurement_id": int(gt["measurement_id"].iloc[-1]),
                    }
                )
    refs = []
    for r in session.exec(select(m.ReferenceOptic).order_by(m.ReferenceOptic.name)).all():
        cal = session.exec(
            select(m.ReferenceCalibration)
            .where(m.ReferenceCalibration.reference_id == r.id)
            .order_by(m.ReferenceCalibration.calibrated_at.desc())
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
    return {"wip": wip, "signals": pd.DataFrame(signals), "references": pd.DataFrame(refs)}


def part_history(*, session: Session, serial: str) -> dict:
    part = session.exec(select(m.Part).where(m.Part.serial == serial)).first()
    if part is None:
        raise NotFound(f"unknown part serial {serial!r}")
    conv = q.part_convergence(session=session, serial=serial)
    meas = q.metric_frame(
        session=session, metric="rms_nm", part=serial, include_check_standards=True
    )
    drawing, callout = q.drawing_callout(session, part.drawing_id)
    results = {
        r.id: r
        for r in session.exec(
            select(m.SurfaceResult).where(m.SurfaceResult.id.in_(meas["result_id"].tolist()))
        )
    }
    meas["verdict"] = [
        "pass" if all(v.passed for v in evaluate(callout, results[int(r)].model_dump())) else "fail"
        for r in meas["result_id"]
    ]
    for col in ("irregularity_nm", "sag_nm"):
        meas[col] = [getattr(results[int(r)], col) for r in meas["result_id"]]
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


def measurement_detail(*, session: Session, blobs: BlobStore, measurement_id: int) -> dict:
    me = session.get(m.Measurement, measurement_id)
    if me is None:
        raise NotFound(f"no measurement {measurement_id}")
    res = q.newest_result(session, me.id)
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
    part = session.get(m.Part, me.part_id)
    run = session.get(m.PolishingRun, me.run_id) if me.run_id else None
    machine = session.get(m.Machine, run.machine_id) if run and run.machine_id else None
    station = session.get(m.Station, me.station_id)
    cal = (
        session.get(m.ReferenceCalibration, me.reference_calibration_id)
        if me.reference_calibration_id
        else None
    )
    ref = session.get(m.ReferenceOptic, cal.reference_id) if cal else None
    drawing, callout = q.drawing_callout(session, part.drawing_id)
    verdicts = pd.DataFrame([v.as_dict() for v in evaluate(callout, res.model_dump())])
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
        if cal
        else None,
        "settings": res.settings,
        "settings_hash": res.settings_hash,
        "software_version": res.software_version,
        "result": {k: getattr(res, k) for k in (*q.SCALAR_METRICS, "slope_max_urad")},
        "bands": pd.DataFrame(res.psd_bands),
        "zernike": zt,
        "verdicts": verdicts,
        "map_nm": blobs.get(me.blob_key).astype(np.float64),
    }


def removal(*, session: Session, blobs: BlobStore, before_id: int, after_id: int) -> dict:
    from shopdb.spc.convergence import removal_map

    a, b = (session.get(m.Measurement, i) for i in (before_id, after_id))
    if a is None or b is None:
        raise NotFound("unknown measurement for the removal map")
    d, pv, rms = removal_map(
        blobs.get(a.blob_key).astype(float), blobs.get(b.blob_key).astype(float)
    )
    return {"map_nm": d, "pv_nm": pv, "rms_nm": rms, "dx_mm": a.dx_mm}


def choices(*, session: Session) -> dict:
    """Names for the pages' selectors."""

    def names(col, model, where=None):
        stmt = sa.select(col).order_by(col)
        if where is not None:
            stmt = stmt.where(where)
        return [r[0] for r in session.execute(stmt).all()]

    return {
        "drawings": names(m.Drawing.number, m.Drawing, m.Drawing.number != q.CHECK_DRAWING),
        "machines": names(m.Machine.name, m.Machine),
        "stations": names(m.Station.name, m.Station),
        "references": names(m.ReferenceOptic.name, m.ReferenceOptic),
        "parts": names(m.Part.serial, m.Part, ~m.Part.serial.like("CS-%")),
        # parts that still take measurements (check standards included)
        "measurable_parts": names(
            m.Part.serial, m.Part, m.Part.status.not_in(m.CLOSED_PART_STATUSES)
        ),
        "lots": names(m.Lot.code, m.Lot),
    }


def admin_lists(*, session: Session) -> dict:
    """Users (no password data), drawings, stations and machines for the admin page."""

    def frame(stmt, columns):
        return pd.DataFrame(session.execute(stmt).all(), columns=columns)

    return {
        "users": frame(
            sa.select(m.User.username, m.User.display_name, m.User.role, m.User.active).order_by(
                m.User.username
            ),
            ["user", "name", "role", "active"],
        ),
        "drawings": frame(
            sa.select(
                m.Drawing.number,
                m.Drawing.revision,
                m.Drawing.title,
                m.Drawing.surface_form_callout,
                m.Drawing.clear_aperture_mm,
                m.Drawing.min_valid_fraction,
            ).order_by(m.Drawing.number, m.Drawing.revision),
            ["number", "revision", "title", "callout", "clear aperture (mm)", "min valid fraction"],
        ),
        "stations": frame(
            sa.select(
                m.Station.name,
                m.Station.instrument,
                m.Station.wavelength_nm,
                m.Station.requires_reference,
                m.Station.profile,
            ).order_by(m.Station.name),
            ["station", "instrument", "wavelength (nm)", "requires reference", "profile"],
        ),
        "machines": frame(
            sa.select(m.Machine.name, m.Machine.kind, m.Machine.notes).order_by(m.Machine.name),
            ["machine", "kind", "notes"],
        ),
    }
