"""Polishing guidance: ``shopdb plan`` (the dwell map of a sub-aperture machine's next run)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from shopdb.cli.common import HomeOpt, JsonOpt, emit_json, read
from shopdb.errors import ShopdbError


def plan(
    serial: Annotated[
        str, typer.Argument(help="Part serial: its final measurement is planned on.")
    ],
    sigma: Annotated[
        float | None, typer.Option("--tif-sigma", help="Gaussian TIF: sigma in mm.")
    ] = None,
    peak: Annotated[
        float | None, typer.Option("--tif-peak", help="Gaussian TIF: peak removal rate, nm/s.")
    ] = None,
    spot: Annotated[
        tuple[Path, Path] | None,
        typer.Option("--spot", help="Measured TIF: the spot test's map before and after."),
    ] = None,
    spot_dwell: Annotated[float, typer.Option(help="Dwell of the spot test, s.")] = 0.0,
    spot_diameter: Annotated[float, typer.Option(help="Diameter to cut the spot to, mm.")] = 0.0,
    spacing: Annotated[float, typer.Option(help="Machine grid spacing, mm.")] = 1.0,
    margin: Annotated[
        float | None,
        typer.Option(help="How far past the aperture the tool centre may go, mm (TIF radius)."),
    ] = None,
    dwell_csv: Annotated[
        Path | None, typer.Option("--dwell-csv", help="Write the dwell grid (x_mm,y_mm,dwell_s).")
    ] = None,
    predicted: Annotated[
        Path | None,
        typer.Option("--predicted", help="Write the predicted map (.x3p, .npz, .csv ...)."),
    ] = None,
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Plan the next run of a sub-aperture machine: the dwell map that removes the part's
    error, its total time and the predicted result with its verdict against the drawing.

    A prediction: it supports, never replaces, the lead's judgement and the drawing.

    Example: shopdb plan 150-0100 --tif-sigma 2.5 --tif-peak 2 --dwell-csv dwell.csv --predicted next.x3p
    """
    from shopdb.quantities import period_range
    from shopdb.services import plan as planning
    from shopdb.surface.dwell import GaussianTIF

    if spot is not None:
        if sigma is not None or peak is not None:
            raise ShopdbError("--spot: give a measured TIF or a Gaussian one, not both")
        if not (spot_dwell > 0 and spot_diameter > 0):
            raise ShopdbError("--spot needs --spot-dwell and --spot-diameter (positive)")
        tif = planning.spot_tif_from_files(
            str(spot[0]), str(spot[1]), dwell_s=spot_dwell, diameter_mm=spot_diameter
        )
    else:
        if sigma is None or peak is None:
            raise ShopdbError("give the TIF: --tif-sigma and --tif-peak, or --spot BEFORE AFTER")
        try:
            tif = GaussianTIF(sigma_mm=sigma, peak_nm_per_s=peak)
        except ValueError as exc:
            raise ShopdbError(f"--tif-sigma/--tif-peak: {exc}") from None
    if predicted is not None:
        planning.check_predicted_path(str(predicted))
    if not spacing > 0:
        raise ShopdbError(f"--spacing {spacing}: must be positive")
    out = read(
        home,
        lambda shop, s: planning.plan_next_run(
            session=s,
            blobs=shop.blobs,
            serial=serial,
            tif=tif,
            spacing_mm=spacing,
            margin_mm=margin,
        ),
    )
    written = planning.export_plan(
        out,
        dwell_csv=str(dwell_csv) if dwell_csv else None,
        predicted=str(predicted) if predicted else None,
    )
    if as_json:
        emit_json({k: v for k, v in out.items() if k not in ("plan", "dx_mm")} | {"files": written})
        return
    b, p = out["before"], out["predicted"]
    typer.echo(f"plan for {out['part']} ({out['drawing']}), measurement {out['measurement_id']}")
    typer.echo(
        f"TIF {out['tif']['kind'].removesuffix('TIF').lower()} TIF, "
        f"{out['tif']['diameter_mm']:.1f} mm, {out['tif']['volume_rate_mm3_per_min']:.4f} mm³/min; "
        f"grid {out['spacing_mm']:.2f} mm, {out['grid_points']} points, "
        f"total dwell {out['total_time_min']:.1f} min"
    )
    typer.echo(f"{'':26}{'now':>10}{'predicted':>12}")
    for label, key in (("PV", "pv_nm"), ("RMS", "rms_nm"), ("irregularity", "irregularity_nm")):
        typer.echo(f"{label + ' (nm)':26}{b[key]:>10.2f}{p[key]:>12.2f}")
    for bb, pb in zip(b["bands"], p["bands"], strict=True):
        label = f"RMS {period_range(pb['low_per_mm'], pb['high_per_mm'])} (nm)"
        typer.echo(f"{label:26}{bb['rms_nm']:>10.2f}{pb['rms_nm']:>12.2f}")
    fails = ", ".join(out["failed_fields"])
    typer.echo(f"predicted verdict: {out['verdict'].upper()}" + (f" ({fails})" if fails else ""))
    for f in written:
        typer.echo(f"wrote {f}")


def register(app: typer.Typer) -> None:
    app.command("plan")(plan)
