"""What each polishing run removed, per machine over time, and which lap to use next.

A run's removal is the part's last valid map before the run started minus its latest valid map
of the run (:func:`shopdb.surface.removal.difference`: registered on the aperture, piston
removed), kept as a :class:`~shopdb.models.RunRemoval` with its PV, RMS, PSD band RMS and
Zernike terms. It is recorded at ingest (in the ingest's transaction) and for older data by
:func:`backfill`. Where a run's parameters give the depth removed (``removed_nm``, e.g. from a
thickness gauge), pressure (``pressure_kpa``), speed (``speed_m_s``) and duration
(``dwell_min``), Preston's coefficient of the run follows (:mod:`shopdb.spc.preston`).

The ranking of full-aperture machines for a part's next run (:func:`rank_machines`): each
machine's removals on the part's drawing from runs that started nearest the part's present
irregularity, as Zernike surfaces on the part's current map, subtracted from it one by one; the
spread of the predicted irregularity over those removals is the interval. A prediction from the record: it supports, never replaces, the lead's judgement.
"""

from __future__ import annotations

import dataclasses
import math
import statistics
from typing import Any

import numpy as np
from sqlmodel import Session, col, select

from shopdb import models as m
from shopdb.blobs import BlobStore
from shopdb.errors import ShopdbError
from shopdb.services.health import guard_blob_references
from shopdb.services.lookups import (
    drawing_ref,
    final_measurement,
    get_by,
    newest_result,
    run_measurement,
)
from shopdb.surface.settings import AnalysisSettings

RANK_RECENT = 8  # removals per machine a ranking uses


def _before_and_after(session: Session, run: m.PolishingRun):
    before = session.exec(
        select(m.Measurement)
        .where(
            m.Measurement.part_id == run.part_id,
            m.Measurement.status == "valid",
            m.Measurement.measured_at < run.started_at,
        )
        .order_by(col(m.Measurement.measured_at).desc())
    ).first()
    return before, run_measurement(session, run)


def record_run_removal(
    session: Session, blobs: BlobStore, run: m.PolishingRun, *, again: bool = False
) -> m.RunRemoval | None:
    """Record what ``run`` removed, if it has a map before and after and the newest record of
    it is not already of these two (``again``: record it anew all the same, e.g. after a
    reanalysis changed the settings it is summarised with); returns the record (None if there
    is nothing to record)."""
    from shopdb.surface.analysis import analyze
    from shopdb.surface.maps import SurfaceMap
    from shopdb.surface.removal import difference

    before, after = _before_and_after(session, run)
    if before is None or after is None:
        return None
    last = latest(session, run.id)
    if (
        not again
        and last is not None
        and (last.before_measurement_id, last.after_measurement_id) == (before.id, after.id)
    ):
        return last
    b = blobs.get(before.blob_key).astype(np.float64)
    a = blobs.get(after.blob_key).astype(np.float64)
    if b.shape != a.shape or not math.isclose(before.dx_mm, after.dx_mm, rel_tol=1e-6):
        return None  # maps of different grids: not compared (a different station set-up)
    try:
        d = difference(b, a)
        settings = AnalysisSettings.from_dict(newest_result(session, after.id).settings)
        summary = analyze(
            SurfaceMap(d.map_nm, before.dx_mm, None, "surface"),
            dataclasses.replace(settings, remove=("piston",)),
        )
    except ValueError:
        return None  # too little overlap to say what was removed
    guard_blob_references(session)
    key = blobs.put(d.map_nm.astype(np.float32))
    depth = (run.params or {}).get("removed_nm")
    row = m.RunRemoval(
        run_id=run.id,
        before_measurement_id=before.id,
        after_measurement_id=after.id,
        blob_key=key,
        dx_mm=before.dx_mm,
        pv_nm=d.pv_nm,
        rms_nm=d.rms_nm,
        depth_nm=float(depth) if isinstance(depth, int | float) else None,
        bands=[b.as_dict() for b in summary.psd_bands],
        zernike=[[n, mm, c] for n, mm, c in summary.zernike_nm],
    )
    session.add(row)
    session.flush()
    return row


def refresh_for(session: Session, blobs: BlobStore, me: m.Measurement) -> int:
    """Record anew the removals ``me`` is the map before or after of (its result was just
    reanalysed); returns how many."""
    runs = session.exec(
        select(m.RunRemoval.run_id)
        .where(
            (m.RunRemoval.before_measurement_id == me.id)
            | (m.RunRemoval.after_measurement_id == me.id)
        )
        .distinct()
    ).all()
    n = 0
    for run_id in sorted(runs):
        run = session.get(m.PolishingRun, run_id)
        if run is not None and record_run_removal(session, blobs, run, again=True) is not None:
            n += 1
    return n


def latest(session: Session, run_id: int) -> m.RunRemoval | None:
    return session.exec(
        select(m.RunRemoval)
        .where(m.RunRemoval.run_id == run_id)
        .order_by(col(m.RunRemoval.id).desc())
    ).first()


def backfill(session: Session, blobs: BlobStore) -> int:
    """Record the removal of every run that has none (``shopdb db upgrade``)."""
    have = set(session.exec(select(m.RunRemoval.run_id)))
    n = 0
    for run in session.exec(select(m.PolishingRun).order_by(col(m.PolishingRun.id))).all():
        if run.id not in have and record_run_removal(session, blobs, run) is not None:
            n += 1
    return n


def _preston(run: m.PolishingRun, depth_nm: float | None) -> float | None:
    from shopdb.spc.preston import preston_coefficient

    p = run.params or {}
    try:
        return preston_coefficient(
            float(depth_nm),
            float(p["pressure_kpa"]),
            float(p["speed_m_s"]),
            60 * float(p["dwell_min"]),
        )
    except (KeyError, TypeError, ValueError):
        return None


def _band_rms(result: m.SurfaceResult | None) -> list[float | None]:
    return [b.get("rms_nm") for b in (result.psd_bands if result else [])]


def _band_edges(result: m.SurfaceResult | None) -> list[list[float | None]]:
    return [
        [b.get("low_per_mm"), b.get("high_per_mm")] for b in (result.psd_bands if result else [])
    ]


def part_removals(*, session: Session, serial: str) -> list[dict]:
    """Each run of the part: machine, pad, what it removed (RMS, bands), the band RMS before
    and after it and their ratio (convergence per band: a machine that corrects form but adds
    ripple shows a ratio above 1 in the fine bands), and Preston's coefficient."""
    part = get_by(session, m.Part, "serial", serial, "part serial")
    out = []
    for run in session.exec(
        select(m.PolishingRun)
        .where(m.PolishingRun.part_id == part.id)
        .order_by(col(m.PolishingRun.iteration))
    ):
        rem = latest(session, run.id)
        machine = session.get(m.Machine, run.machine_id) if run.machine_id else None
        row = {
            "iteration": run.iteration,
            "machine": machine.name if machine else None,
            "pad": (run.params or {}).get("pad"),
            "started_at": run.started_at,
            "removal_rms_nm": rem.rms_nm if rem else None,
            "removal_pv_nm": rem.pv_nm if rem else None,
            "removal_bands": rem.bands if rem else [],
            "depth_nm": rem.depth_nm if rem else None,
            "preston_per_pa": _preston(run, rem.depth_nm) if rem and rem.depth_nm else None,
            "band_ratio": [],
            "ratio_bands": [],
        }
        if rem:
            before_result = newest_result(session, rem.before_measurement_id)
            before = _band_rms(before_result)
            after = _band_rms(newest_result(session, rem.after_measurement_id))
            row["ratio_bands"] = _band_edges(before_result)
            row["band_ratio"] = [
                (a / b if a is not None and b else None)
                for b, a in zip(before, after, strict=False)
            ]
        out.append(row)
    return out


def machine_removals(*, session: Session, drawing: str | None = None) -> list[dict]:
    """Per machine: its runs' removals over time (RMS, per band, Preston's coefficient) and the
    mean shape of its removal (mean Zernike terms, largest first); with an I-MR chart of
    Preston's coefficient where enough runs give it (a pad or slurry change shows as a shift)."""
    from shopdb.spc.charts import individuals

    drawing_id = drawing_ref(session, drawing).id if drawing is not None else None
    by_machine = _newest_by_machine(session, drawing_id)
    out = []
    for name, items in sorted(by_machine.items()):
        terms: dict[tuple[int, int], list[float]] = {}
        for rem, *_ in items:
            for n, mm, c in rem.zernike:
                terms.setdefault((n, mm), []).append(c)
        shape = sorted(
            ((k, statistics.fmean(v)) for k, v in terms.items() if k != (0, 0)),
            key=lambda kv: -abs(kv[1]),
        )
        runs = [
            {
                "part": part.serial,
                "iteration": run.iteration,
                "pad": (run.params or {}).get("pad"),
                "started_at": run.started_at,
                "removal_rms_nm": rem.rms_nm,
                "bands_nm": [b.get("rms_nm") for b in rem.bands],
                "preston_per_pa": _preston(run, rem.depth_nm) if rem.depth_nm else None,
            }
            for rem, run, _machine, part in items
        ]
        kp = [r for r in runs if r["preston_per_pa"] is not None]
        chart = None
        if len(kp) >= 5:
            table = individuals(
                [r["preston_per_pa"] for r in kp],
                phases=[r["pad"] or "-" for r in kp],
                direction="none",
            )
            chart = {
                "started_at": [r["started_at"] for r in kp],
                "part": [r["part"] for r in kp],
                "values": [r["preston_per_pa"] for r in kp],
                "pads": [r["pad"] for r in kp],
                "centre": table["centre"].tolist(),
                "ucl": table["ucl"].tolist(),
                "lcl": table["lcl"].tolist(),
                "signals": int(table["signal"].astype(bool).sum()) if "signal" in table else 0,
            }
        out.append(
            {
                "machine": name,
                "kind": items[0][2].kind,
                "runs": runs,
                "mean_removal_rms_nm": statistics.fmean(r["removal_rms_nm"] for r in runs),
                "mean_shape_nm": [[n, mm, c] for (n, mm), c in shape[:6]],
                "preston_chart": chart,
            }
        )
    return out


def rank_machines(*, session: Session, blobs: BlobStore, serial: str) -> list[dict]:
    """Full-aperture machines with removals on the part's drawing, ranked by the predicted
    irregularity of one more run on the part's current map (mean ± standard deviation over
    the machine's comparable removals; see the module notes)."""
    from shopdb.surface.analysis import analyze
    from shopdb.surface.maps import SurfaceMap
    from shopdb.surface.removal import from_terms

    part = get_by(session, m.Part, "serial", serial, "part serial")
    me, why = final_measurement(session, part)
    if me is None:
        raise ShopdbError(f"part {serial}: {why}; nothing to rank on")
    settings = AnalysisSettings.from_dict(newest_result(session, me.id).settings)
    current = blobs.get(me.blob_key).astype(np.float64)
    now = analyze(SurfaceMap(current, me.dx_mm, me.wavelength_nm, me.kind), settings)
    ranked: list[dict[str, Any]] = []
    for name, items in sorted(_newest_by_machine(session, part.drawing_id).items()):
        kind = (items[0][2].kind or "").lower()
        if "cnc" in kind or "sub-aperture" in kind:
            continue  # sub-aperture machines are planned (shopdb plan), not ranked
        recent = _comparable(session, [rem for rem, *_ in items], now.irregularity_nm)
        predicted = []
        for rem in recent:
            removal = from_terms(current, [(n, mm, c) for n, mm, c in rem.zernike if n > 0])
            after = analyze(
                SurfaceMap(current - removal, me.dx_mm, me.wavelength_nm, me.kind), settings
            )
            predicted.append(after.irregularity_nm)
        if len(predicted) < 2:
            continue
        ranked.append(
            {
                "machine": name,
                "removals": len(predicted),
                "irregularity_nm": statistics.fmean(predicted),
                "spread_nm": statistics.stdev(predicted),
            }
        )
    ranked.sort(key=lambda r: r["irregularity_nm"])
    return [{"now_irregularity_nm": now.irregularity_nm, **r} for r in ranked]


def _newest_by_machine(session: Session, drawing_id: int | None) -> dict[str, list[tuple]]:
    """Each machine's runs with a removal, (removal, run, machine, part) in run order, the
    newest removal record of each run (on parts of ``drawing_id`` if given)."""
    q = (
        select(m.RunRemoval, m.PolishingRun, m.Machine, m.Part)
        .join(m.PolishingRun, col(m.PolishingRun.id) == m.RunRemoval.run_id)
        .join(m.Machine, col(m.Machine.id) == m.PolishingRun.machine_id)
        .join(m.Part, col(m.Part.id) == m.PolishingRun.part_id)
        .order_by(col(m.PolishingRun.started_at), col(m.RunRemoval.id))
    )
    if drawing_id is not None:
        q = q.where(m.Part.drawing_id == drawing_id)
    newest: dict[int, tuple] = {}
    for rem, run, machine, part in session.exec(q):
        newest[run.id] = (rem, run, machine, part)  # a later record of a run supersedes
    by_machine: dict[str, list[tuple]] = {}
    for item in sorted(newest.values(), key=lambda it: it[1].started_at):
        by_machine.setdefault(item[2].name, []).append(item)
    return by_machine


def _comparable(
    session: Session, removals: list[m.RunRemoval], irregularity_nm: float
) -> list[m.RunRemoval]:
    """The ``RANK_RECENT`` of a machine's removals from runs that started nearest the part's
    present state (irregularity before the run, on a log scale): a lap removes about a
    fraction of the error it is given, so a run on a part far from finished says little about
    one more run on a part nearly there."""
    scored = []
    for rem in removals:
        before = newest_result(session, rem.before_measurement_id).irregularity_nm
        if before and before > 0 and irregularity_nm > 0:
            scored.append((abs(math.log(before / irregularity_nm)), rem.id, rem))
    return [rem for *_, rem in sorted(scored)[:RANK_RECENT]]
