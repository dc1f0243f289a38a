"""The next run of a sub-aperture machine: a dwell map for the part's latest measurement, its
predicted result and that result's verdict against the drawing (``shopdb plan``); the tool
influence functions of the machines and the plans as records, and the plans' predictions
against what the runs that followed them achieved.

The error to correct is the part's final measurement as stored, with what its analysis removes
(piston, tilt, and power where the settings say so) taken out, over the drawing's clear aperture
(centred on the map's valid pixels); the drawing's target figure is the nominal surface, so the
target removal is that error above its lowest point. The dwell is planned by
:func:`shopdb.surface.dwell.plan_dwell`; the predicted map is analysed with the result's own
settings and judged by :func:`shopdb.services.verdict.judge_map` without an uncertainty budget
(a prediction, not a measurement).
"""

from __future__ import annotations

import math

import numpy as np
from sqlmodel import Session, col, select

from shopdb import models as m
from shopdb.blobs import BlobStore
from shopdb.errors import ShopdbError
from shopdb.services.audit import canonical_json
from shopdb.services.health import guard_blob_references
from shopdb.services.lookups import (
    drawing_callout,
    final_measurement,
    get_by,
    newest_result,
    run_measurement,
)
from shopdb.services.masterdata import create_audited
from shopdb.services.users import require
from shopdb.services.verdict import judge_map
from shopdb.spc.decision import DecisionRule
from shopdb.surface.settings import AnalysisSettings


def plan_next_run(
    *,
    session: Session,
    blobs: BlobStore,
    serial: str,
    tif,
    spacing_mm: float = 1.0,
    margin_mm: float | None = None,
) -> dict:
    """The plan for part ``serial``: dwell grid, predicted map, before/after numbers, verdict."""
    from shopdb.surface import dwell
    from shopdb.surface.analysis import analyze
    from shopdb.surface.maps import SurfaceMap
    from shopdb.surface.removal import detrend

    part = get_by(session, m.Part, "serial", serial, "part serial")
    me, why = final_measurement(session, part)
    if me is None:
        raise ShopdbError(f"part {serial}: {why}; nothing to plan on")
    result = newest_result(session, me.id)
    settings = AnalysisSettings.from_dict(result.settings)
    drawing, callout = drawing_callout(session, part.drawing_id)
    height = blobs.get(me.blob_key).astype(np.float64)
    valid = np.isfinite(height)
    if valid.sum() < 16:
        raise ShopdbError(f"measurement {me.id}: too few valid pixels to plan on")
    rows, cols = np.nonzero(valid)
    rr, cc = np.ogrid[: height.shape[0], : height.shape[1]]
    r = np.hypot(rr - rows.mean(), cc - cols.mean()) * me.dx_mm
    height = np.where(r <= drawing.clear_aperture_mm / 2, height, np.nan)
    error = detrend(height, tuple(t for t in settings.remove if t in ("piston", "tilt", "power")))
    try:
        plan = dwell.plan_dwell(error, me.dx_mm, tif, spacing_mm=spacing_mm, margin_mm=margin_mm)
    except ValueError as exc:
        raise ShopdbError(f"plan for {serial}: {exc}") from None
    before = analyze(SurfaceMap(error, me.dx_mm, me.wavelength_nm, me.kind), settings)
    predicted_map = SurfaceMap(plan.predicted_nm, me.dx_mm, me.wavelength_nm, me.kind)
    after = analyze(predicted_map, settings)
    conformance = judge_map(
        after.stored(),
        callout,
        surface=predicted_map,
        settings=settings,
        clear_aperture_mm=drawing.clear_aperture_mm,
        rule=DecisionRule.parse(drawing.decision_rule),
    )
    return {
        "part": serial,
        "drawing": f"{drawing.number} rev {drawing.revision}",
        "measurement_id": me.id,
        "tif": _describe(tif),
        "spacing_mm": plan.spacing_mm,
        "grid_points": int((plan.dwell_s > 0).sum()),
        "total_time_min": plan.total_time_s / 60,
        "iterations": plan.iterations,
        "before": _numbers(before),
        "predicted": _numbers(after),
        "verdict": "pass" if conformance.passes else "fail",
        "failed_fields": conformance.failed,
        "fields": [f.as_dict() for f in conformance.fields],
        "plan": plan,
        "dx_mm": me.dx_mm,
        "margin_mm": margin_mm,
        "error_nm": error,
    }


NOT_JSON = ("plan", "dx_mm", "margin_mm", "error_nm")  # arrays and the plan object


def plan_with_record(
    *, session: Session, blobs: BlobStore, serial: str, tif_id: int, spacing_mm: float = 1.0
) -> tuple[dict, m.ToolInfluence]:
    """:func:`plan_next_run` with a recorded TIF (by id)."""
    row = session.get(m.ToolInfluence, tif_id)
    if row is None:
        raise ShopdbError(f"no tool influence function {tif_id}")
    out = plan_next_run(
        session=session,
        blobs=blobs,
        serial=serial,
        tif=tif_model(row, blobs),
        spacing_mm=spacing_mm,
    )
    return out, row


def record_new_plan(
    *,
    session: Session,
    blobs: BlobStore,
    actor: m.User,
    serial: str,
    tif_id: int,
    spacing_mm: float = 1.0,
) -> m.DwellPlan:
    """Plan and keep it in one transaction (the app's "Record this plan")."""
    require(actor, "plan_runs")
    out, row = plan_with_record(
        session=session, blobs=blobs, serial=serial, tif_id=tif_id, spacing_mm=spacing_mm
    )
    return record_plan(session=session, blobs=blobs, actor=actor, out=out, tif_row=row)


def _numbers(a) -> dict:
    return {
        "pv_nm": a.pv_nm,
        "rms_nm": a.rms_nm,
        "irregularity_nm": a.irregularity_nm,
        "bands": [b.as_dict() for b in a.psd_bands],
    }


def _describe(tif) -> dict:
    out = {"kind": type(tif).__name__, "volume_rate_mm3_per_min": tif.volume_rate_mm3_per_min}
    for k in ("sigma_mm", "peak_nm_per_s"):
        if hasattr(tif, k):
            out[k] = getattr(tif, k)
    out["diameter_mm"] = tif.diameter_mm
    return {
        k: (round(v, 6) if isinstance(v, float) and math.isfinite(v) else v) for k, v in out.items()
    }


def spot_tif_from_files(before: str, after: str, *, dwell_s: float, diameter_mm: float):
    """A measured TIF from a spot test's two maps (any readable format, same pixel size)."""
    from shopdb.formats import FormatError, read_map
    from shopdb.surface import dwell

    try:
        a, b = read_map(before), read_map(after)
    except FormatError as exc:
        raise ShopdbError(str(exc)) from None
    if a.height_nm.shape != b.height_nm.shape or not math.isclose(a.dx_mm, b.dx_mm, rel_tol=1e-6):
        raise ShopdbError(f"spot test {before}, {after}: the two maps differ in size or pixel")
    try:
        return dwell.spot_tif(a.height_nm, b.height_nm, a.dx_mm, dwell_s, diameter_mm)
    except ValueError as exc:
        raise ShopdbError(f"spot test {before}, {after}: {exc}") from None


def check_predicted_path(path: str) -> str:
    """The format a predicted map is written in, by its suffix (before any work is done)."""
    from pathlib import Path

    from shopdb.formats import SUFFIXES, WRITERS

    fmt = SUFFIXES.get(Path(path).suffix.lower())
    if fmt not in WRITERS:
        raise ShopdbError(
            f"--predicted {path}: cannot write {Path(path).suffix or 'a file without a suffix'}; "
            f"use one of {', '.join(sorted(k for k, v in SUFFIXES.items() if v in WRITERS))}"
        )
    return fmt


def export_plan(out: dict, *, dwell_csv: str | None, predicted: str | None) -> list[str]:
    """Write the dwell grid as CSV (x_mm, y_mm, dwell_s; machine coordinates of the map, x
    right, y up) and the predicted map in any writable format; both or neither."""
    import csv
    import io
    from pathlib import Path

    from shopdb.formats import FormatError, write_map
    from shopdb.surface.maps import SurfaceMap

    plan = out["plan"]
    written: list[str] = []
    staged: list[tuple[Path, Path]] = []
    try:
        if dwell_csv:
            x, y = plan.grid_mm()
            buf = io.StringIO()
            w = csv.writer(buf, lineterminator="\n")
            w.writerow(["x_mm", "y_mm", "dwell_s"])
            for xi, yi, t in zip(x.ravel(), y.ravel(), plan.dwell_s.ravel(), strict=True):
                if t >= 5e-4:  # what rounds to a millisecond or more
                    w.writerow([f"{xi:.4f}", f"{yi:.4f}", f"{t:.3f}"])
            target = Path(dwell_csv)
            tmp = target.with_name(f".{target.name}.part")
            tmp.write_text(buf.getvalue(), encoding="utf-8")
            staged.append((tmp, target))
        if predicted:
            target = Path(predicted)
            tmp = target.with_name(f".{target.name}.part{target.suffix}")
            surface = SurfaceMap(plan.predicted_nm, out["dx_mm"], None, "surface")
            write_map(tmp, surface, format=check_predicted_path(predicted))
            staged.append((tmp, target))
        for tmp, target in staged:
            tmp.replace(target)
            written.append(str(target))
    except (OSError, FormatError) as exc:
        for tmp, _ in staged:
            tmp.unlink(missing_ok=True)
        raise ShopdbError(f"plan files: {exc}") from None
    return written


# --- records: tool influence functions, plans, predicted against achieved ---------------------


def add_tool_influence(
    *,
    session: Session,
    blobs: BlobStore,
    actor: m.User,
    machine: str,
    name: str,
    tif,
    notes: str = "",
) -> m.ToolInfluence:
    """Record a machine's TIF (a :class:`~shopdb.surface.dwell.GaussianTIF` or a measured
    :class:`~shopdb.surface.dwell.MeasuredTIF`, whose rate map goes to the blob store)."""
    from shopdb.surface.dwell import GaussianTIF

    require(actor, "plan_runs")
    mach = get_by(session, m.Machine, "name", machine, "machine")
    if not name.strip():
        raise ShopdbError("a tool influence function needs a name (tool and pad)")
    row = m.ToolInfluence(
        machine_id=mach.id, name=name.strip(), kind="", recorded_by_id=actor.id, notes=notes
    )
    if isinstance(tif, GaussianTIF):
        row.kind = "gaussian"
        row.params = {"sigma_mm": tif.sigma_mm, "peak_nm_per_s": tif.peak_nm_per_s}
    else:
        guard_blob_references(session)
        row.kind = "spot"
        row.blob_key = blobs.put(np.asarray(tif.rate_nm_per_s, np.float32))
        row.dx_mm = tif.dx_mm
        row.params = {"volume_rate_mm3_per_min": tif.volume_rate_mm3_per_min}
    return create_audited(session, actor, row, action="plan_runs")


def tool_influence(session: Session, name: str, machine: str | None = None) -> m.ToolInfluence:
    """The newest TIF record of that name (of ``machine`` if given)."""
    q = (
        select(m.ToolInfluence, m.Machine)
        .join(m.Machine, col(m.Machine.id) == m.ToolInfluence.machine_id)
        .where(m.ToolInfluence.name == name)
    )
    if machine is not None:
        q = q.where(m.Machine.name == machine)
    rows = session.exec(q.order_by(col(m.ToolInfluence.id).desc())).all()
    if not rows:
        raise ShopdbError(
            f"unknown tool influence function {name!r}" + (f" on {machine}" if machine else "")
        )
    if len({mach.name for _, mach in rows}) > 1:
        raise ShopdbError(
            f"tool influence function {name!r} exists on several machines: name the machine"
        )
    return rows[0][0]


def tif_model(row: m.ToolInfluence, blobs: BlobStore):
    from shopdb.surface.dwell import GaussianTIF, MeasuredTIF

    if row.kind == "gaussian":
        return GaussianTIF(
            sigma_mm=row.params["sigma_mm"], peak_nm_per_s=row.params["peak_nm_per_s"]
        )
    assert row.blob_key is not None and row.dx_mm is not None
    return MeasuredTIF(blobs.get(row.blob_key).astype(np.float64), row.dx_mm)


def list_tool_influences(*, session: Session) -> list[dict]:
    out = []
    for row, mach in session.exec(
        select(m.ToolInfluence, m.Machine)
        .join(m.Machine, col(m.Machine.id) == m.ToolInfluence.machine_id)
        .order_by(col(m.Machine.name), col(m.ToolInfluence.name), col(m.ToolInfluence.id))
    ):
        out.append(
            {
                "id": row.id,
                "machine": mach.name,
                "name": row.name,
                "kind": row.kind,
                "params": row.params,
                "recorded_at": row.recorded_at,
            }
        )
    newest = {(r["machine"], r["name"]): r for r in out}  # newer supersedes
    return list(newest.values())


def record_plan(
    *,
    session: Session,
    blobs: BlobStore,
    actor: m.User,
    out: dict,
    tif_row: m.ToolInfluence,
) -> m.DwellPlan:
    """Keep a plan made by :func:`plan_next_run` with a recorded TIF."""
    import hashlib

    from shopdb import __version__

    require(actor, "plan_runs")
    part = get_by(session, m.Part, "serial", out["part"], "part serial")
    plan = out["plan"]
    settings = {
        "spacing_mm": plan.spacing_mm,
        "margin_mm": out.get("margin_mm"),
        "tool_influence_id": tif_row.id,
        "software": __version__,
    }
    guard_blob_references(session)
    row = m.DwellPlan(
        part_id=part.id,
        measurement_id=out["measurement_id"],
        tool_influence_id=tif_row.id,
        settings=settings,
        settings_sha256=hashlib.sha256(canonical_json(settings).encode()).hexdigest(),
        dwell_blob=blobs.put(plan.dwell_s.astype(np.float32)),
        total_time_s=plan.total_time_s,
        predicted={k: out["predicted"][k] for k in ("pv_nm", "rms_nm", "irregularity_nm", "bands")},
        predicted_verdict=out["verdict"],
        planned_by_id=actor.id,
    )
    return create_audited(session, actor, row, action="plan_runs")


def check_plan_for_run(session: Session, part: m.Part, plan_id) -> None:
    """A run may name a plan of its own part that no other run named (``run start --plan``)."""
    if not isinstance(plan_id, int):
        raise ShopdbError(f"plan {plan_id!r}: give the plan's number")
    row = session.get(m.DwellPlan, plan_id)
    if row is None:
        raise ShopdbError(f"no plan {plan_id}")
    if row.part_id != part.id:
        raise ShopdbError(f"plan {plan_id} is for another part than {part.serial}")
    for run in session.exec(select(m.PolishingRun).where(m.PolishingRun.part_id == part.id)):
        if (run.params or {}).get("plan_id") == plan_id:
            raise ShopdbError(f"plan {plan_id} was followed by run {run.iteration} already")


def plans_against_runs(*, session: Session, machine: str | None = None) -> list[dict]:
    """Each plan a run followed: predicted RMS and irregularity against what the run achieved
    (its latest valid measurement's newest result), per machine, oldest first."""
    out = []
    runs = session.exec(
        select(m.PolishingRun, m.Part, m.Machine)
        .join(m.Part, col(m.Part.id) == m.PolishingRun.part_id)
        .join(m.Machine, col(m.Machine.id) == m.PolishingRun.machine_id)
        .order_by(col(m.PolishingRun.started_at))
    ).all()
    for run, part, mach in runs:
        plan_id = (run.params or {}).get("plan_id")
        if plan_id is None or (machine is not None and mach.name != machine):
            continue
        plan = session.get(m.DwellPlan, plan_id)
        after = run_measurement(session, run)
        if plan is None or after is None:
            continue
        res = newest_result(session, after.id)
        out.append(
            {
                "machine": mach.name,
                "part": part.serial,
                "iteration": run.iteration,
                "plan_id": plan.id,
                "started_at": run.started_at,
                "predicted_rms_nm": plan.predicted["rms_nm"],
                "achieved_rms_nm": res.rms_nm,
                "predicted_irregularity_nm": plan.predicted["irregularity_nm"],
                "achieved_irregularity_nm": res.irregularity_nm,
            }
        )
    return out
