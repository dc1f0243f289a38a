"""The next run of a sub-aperture machine: a dwell map for the part's latest measurement, its
predicted result and that result's verdict against the drawing (``shopdb plan``).

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
from sqlmodel import Session

from shopdb import models as m
from shopdb.blobs import BlobStore
from shopdb.errors import ShopdbError
from shopdb.services.lookups import drawing_callout, final_measurement, get_by, newest_result
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
    }


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
