"""Metrology lab: three-flat absolute calibration of reference flats into calibration records.

The solved coefficients (determined terms only), the error map on the measurement grid, the
uncertainty and the method become one audited ReferenceCalibration per flat; the drift charts and
the release rules read those records. A report (HTML or PDF) shows the three solved maps with
their uncertainty.
"""

from __future__ import annotations

import base64
import html
import io
import math
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
from fpdf import FPDF
from sqlmodel import Session

from shopdb.blobs import BlobStore
from shopdb.errors import ShopdbError
from shopdb.formats import FormatError, Metadata, read_map
from shopdb.models import GageStudy as GageStudyRecord
from shopdb.models import ReferenceCalibration, ReferenceOptic, Station, User, utcnow
from shopdb.services.health import guard_blob_references
from shopdb.services.lookups import get_by
from shopdb.services.masterdata import add_calibration
from shopdb.services.users import require
from shopdb.surface import flats, image, zernike

METHOD = "three-flat, Zernike (Fritz 1984)"


def calibrate_three_flat(
    *,
    session: Session,
    blobs: BlobStore,
    actor: User,
    files: dict[str, list[Path]],
    references: list[str],
    angle_deg: float = 90.0,
    flip_axis: str = "y",
    order: int = 8,
    calibrated_at: datetime | None = None,
    valid_days: float = 90.0,
    metadata: Metadata = Metadata(),
    format: str | None = None,
) -> tuple[list[ReferenceCalibration], flats.FlatsSolution]:
    """Solve flats A, B, C (= ``references`` in that order) and record one calibration each."""
    require(actor, "calibrate")
    if len(references) != 3 or len(set(references)) != 3:
        raise ShopdbError(
            f"--references needs three different reference optics (A,B,C), got {references}"
        )
    optics = [
        get_by(session, ReferenceOptic, "name", name, "reference optic") for name in references
    ]
    if not (0 < valid_days <= 3660):
        raise ShopdbError(f"--valid-days {valid_days} must be in (0, 3660]")
    maps: dict[str, list] = {}
    for key, paths in files.items():
        maps[key] = []
        for p in paths:
            try:
                maps[key].append(read_map(p, format=format, metadata=metadata).to_surface())
            except FormatError as exc:
                raise ShopdbError(str(exc)) from None
    try:
        sol = flats.solve(maps, angle_deg=angle_deg, flip_axis=flip_axis, order=order)
    except ValueError as exc:
        raise ShopdbError(f"three-flat test: {exc}") from None
    when = calibrated_at or utcnow()
    grid = maps["ab"][0]
    out = []
    guard_blob_references(session)
    for flat, optic in zip(flats.FLATS, optics, strict=True):
        u = sol.uncertainty[flat]
        det = np.isfinite(u)
        key = blobs.put(sol.error_map(flat, grid.height_nm.shape, grid.dx_mm).astype(np.float32))
        out.append(
            add_calibration(
                session=session,
                actor=actor,
                reference_id=optic.id,
                calibrated_at=when,
                valid_until=when + timedelta(days=valid_days),
                method=METHOD,
                # combined standard uncertainty of the solved map (RMS over the aperture)
                uncertainty_nm=float(math.sqrt(float((u[det] ** 2).sum()))),
                coefficients=sol.coefficient_dict(flat),
                pv_nm=sol.pv_nm[flat],
                rms_nm=sol.rms_nm[flat],
                error_map_blob=key,
                details=_details(sol, flat, files),
            )
        )
    return out, sol


def _details(sol: flats.FlatsSolution, flat: str, files: dict) -> dict:
    return {
        "flat": flat,
        "angle_deg": sol.angle_deg,
        "flip_axis": sol.flip_axis,
        "radius_mm": sol.radius_mm,
        "uncertainty_nm": {
            f"{n},{m}": float(v)
            for (n, m), v in zip(sol.terms, sol.uncertainty[flat], strict=True)
            if np.isfinite(v)
        },
        "undetermined": [f"{n},{m}" for n, m in sol.undetermined],
        "not_solved": ["0,0", "1,-1", "1,1"],  # piston and tilt: alignment
        "pv_u_nm": sol.pv_u_nm[flat],
        "rms_u_nm": sol.rms_u_nm[flat],
        "repeatability_nm": sol.sigma_nm,
        "repeatability_from": sol.sigma_source,
        "registration": {
            key: [
                {
                    "centre_offset_mm": list(r.centre_offset_mm),
                    "radius_change_mm": r.radius_change_mm,
                    "residual_rms_nm": r.residual_rms_nm,
                }
                for r in regs
            ]
            for key, regs in sol.registration.items()
        },
        "files": {key: [Path(p).name for p in paths] for key, paths in files.items()},
    }


# --- report -------------------------------------------------------------------------------


def _rows(sol: flats.FlatsSolution) -> list[list[str]]:
    rows = []
    for i, (n, m) in enumerate(sol.terms):
        cells = [f"{zernike.name(n, m)} ({n},{m})"]
        for flat in flats.FLATS:
            c, u = sol.coefficients[flat][i], sol.uncertainty[flat][i]
            cells.append("undetermined" if not np.isfinite(c) else f"{c:+.2f} ± {u:.2f}")
        rows.append(cells)
    return rows


def _maps_png(sol: flats.FlatsSolution) -> dict[str, bytes]:
    return {
        f: image.render(sol.error_map(f, (160, 160), sol.radius_mm / 79.5))[0] for f in flats.FLATS
    }


def report_html(sol: flats.FlatsSolution, references: list[str], calibration_ids: list[int]) -> str:
    e = html.escape
    pngs = _maps_png(sol)
    out = [
        "<!doctype html><html><head><meta charset='utf-8'><title>Three-flat calibration</title>",
        "<style>body{font-family:sans-serif;max-width:60em;margin:2em auto}table{border-collapse:"
        "collapse}td,th{border:1px solid #bbb;padding:.15em .5em;text-align:right}"
        ".maps{display:flex;gap:1em}</style></head><body><h1>Three-flat calibration</h1>",
        f"<p>Method: {e(METHOD)}; rotation {sol.angle_deg:g}° of A, flip about the "
        f"{sol.flip_axis} axis; aperture Ø {2 * sol.radius_mm:.1f} mm. Repeatability "
        f"{sol.sigma_nm:.3f} nm per coefficient (from the {sol.sigma_source}). "
        "Piston and tilt are set by the alignment and are not solved.</p><div class='maps'>",
    ]
    for flat, ref, cid in zip(flats.FLATS, references, calibration_ids, strict=True):
        out.append(
            f"<div><b>{flat} = {e(ref)}</b> (calibration {cid})<br><img width=200 height=200 "
            f"alt='{e(ref)}' src='data:image/png;base64,{base64.b64encode(pngs[flat]).decode()}'><br>"
            f"PV {sol.pv_nm[flat]:.2f} ± {sol.pv_u_nm[flat]:.2f} nm, "
            f"RMS {sol.rms_nm[flat]:.2f} ± {sol.rms_u_nm[flat]:.2f} nm</div>"
        )
    out.append("</div>")
    if sol.undetermined:
        names = ", ".join(f"{zernike.name(n, m)} ({n},{m})" for n, m in sol.undetermined)
        out.append(f"<p><b>Undetermined by this measurement set:</b> {e(names)}</p>")
    out.append("<table><tr><th>term</th><th>A (nm)</th><th>B (nm)</th><th>C (nm)</th></tr>")
    for cells in _rows(sol):
        out.append("<tr>" + "".join(f"<td>{e(c)}</td>" for c in cells) + "</tr>")
    out.append(
        "</table><h3>Registration</h3><table><tr><th>measurement</th><th>centre offset (mm)"
        "</th><th>radius change (mm)</th><th>residual (nm)</th></tr>"
    )
    for key, regs in sol.registration.items():
        for r in regs:
            out.append(
                f"<tr><td>{key}</td><td>{r.centre_offset_mm[0]:+.3f}, {r.centre_offset_mm[1]:+.3f}"
                f"</td><td>{r.radius_change_mm:+.3f}</td><td>{r.residual_rms_nm:.3f}</td></tr>"
            )
    out.append("</table></body></html>")
    return "".join(out)


def report_pdf(
    sol: flats.FlatsSolution, references: list[str], calibration_ids: list[int]
) -> bytes:
    pdf = FPDF(format="A4")
    pdf.add_page()
    pdf.set_font("Helvetica", "B", 14)
    pdf.cell(0, 8, "Three-flat calibration", new_x="LMARGIN", new_y="NEXT")
    pdf.set_font("Helvetica", "", 9)
    pdf.multi_cell(
        0,
        5,
        f"Method: {METHOD}; rotation {sol.angle_deg:g} deg of A, flip about the {sol.flip_axis} "
        f"axis; aperture dia. {2 * sol.radius_mm:.1f} mm. Repeatability {sol.sigma_nm:.3f} nm per "
        f"coefficient (from the {sol.sigma_source}). Piston and tilt are not solved.",
        new_x="LMARGIN",
        new_y="NEXT",
    )
    pngs = _maps_png(sol)
    y = pdf.get_y() + 2
    for i, (flat, ref, cid) in enumerate(
        zip(flats.FLATS, references, calibration_ids, strict=True)
    ):
        x = pdf.l_margin + i * 62
        pdf.image(io.BytesIO(pngs[flat]), x=x, y=y, w=50, h=50)
        pdf.set_xy(x, y + 51)
        pdf.multi_cell(
            60,
            4,
            f"{flat} = {ref} (calibration {cid})\nPV {sol.pv_nm[flat]:.2f} +/- {sol.pv_u_nm[flat]:.2f} nm"
            f"\nRMS {sol.rms_nm[flat]:.2f} +/- {sol.rms_u_nm[flat]:.2f} nm",
        )
    pdf.set_y(y + 66)
    if sol.undetermined:
        pdf.multi_cell(
            0,
            5,
            "Undetermined by this measurement set: "
            + ", ".join(f"Z({n},{m})" for n, m in sol.undetermined),
            new_x="LMARGIN",
            new_y="NEXT",
        )
    pdf.set_font("Helvetica", "", 7)
    with pdf.table(col_widths=(50, 40, 40, 40), text_align="RIGHT") as table:
        table.row(["term", "A (nm)", "B (nm)", "C (nm)"])
        for cells in _rows(sol):
            table.row([c.replace("±", "+/-").replace("°", " deg") for c in cells])
    return bytes(pdf.output())


@dataclass(frozen=True)
class GageStudy:
    """A crossed gage R&R study as read and computed (average-and-range and ANOVA)."""

    shape: tuple[int, int, int]  # operators, parts, trials
    results: list
    tolerance: float | None = None


def gage_study(data: bytes, *, name: str, tolerance: float | None = None) -> GageStudy:
    """A study file (CSV with columns part, operator, trial, value) through both methods of the
    AIAG MSA manual; one-line errors naming the file."""
    from shopdb.spc import msa

    try:
        cube = msa.parse_study(data.decode("utf-8-sig"))
        results = [
            msa.average_and_range(cube, tolerance=tolerance),
            msa.anova(cube, tolerance=tolerance),
        ]
    except UnicodeDecodeError:
        raise ShopdbError(f"{name}: not a UTF-8 text file") from None
    except ValueError as exc:
        raise ShopdbError(f"{name}: {exc}") from None
    k, n, r = cube.shape
    return GageStudy((k, n, r), results, tolerance)


def record_gage_study(
    *,
    session: Session,
    actor: User,
    study: GageStudy,
    station: str,
    quantity: str,
    source_name: str = "",
    studied_at: datetime | None = None,
) -> GageStudyRecord:
    """Keep a gage R&R study of a station for one quantity (metrology): its ANOVA components,
    the reproducibility being AV with the operator-by-part interaction (AIAG MSA, 4th ed.,
    III-B). Later measurements of that quantity on the station take it into their uncertainty."""
    from shopdb import quantities
    from shopdb.services.masterdata import create_audited

    require(actor, "calibrate")
    st = get_by(session, Station, "name", station, "station")
    try:
        q = quantities.parse_metric(quantity)
    except ValueError as exc:
        raise ShopdbError(f"--quantity: {exc}") from None
    g = next(r for r in study.results if r.method.lower().startswith("anova"))
    row = GageStudyRecord(
        station_id=st.id,
        quantity=q.name,
        method="ANOVA (AIAG MSA 4th ed.)",
        repeatability=g.ev,
        reproducibility=math.hypot(g.av, g.interaction),
        grr=g.grr,
        part_variation=g.pv,
        ndc=g.ndc,
        tolerance=study.tolerance,
        source_name=source_name[:255],
        recorded_by_id=actor.id,
        studied_at=studied_at or utcnow(),
    )
    return create_audited(session, actor, row, action="calibrate")
