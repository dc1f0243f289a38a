"""Polishing guidance: ``shopdb plan`` (the dwell map of a sub-aperture machine's next run) and
``shopdb removal part|machines|rank`` (what runs removed, per machine, and which lap next)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from shopdb.cli.common import HomeOpt, JsonOpt, emit_json, read, table, when
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


removal_app = typer.Typer(
    help="What each polishing run removed, per machine over time, and which lap next.",
    no_args_is_help=True,
)


def _nm(x):
    return None if x is None else round(x, 2)


@removal_app.command("part")
def removal_part(
    serial: Annotated[str, typer.Argument(help="Part serial.")],
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Run by run: the machine and pad, what the run removed (RMS, PV, depth where recorded),
    Preston's coefficient, and the ratio after/before per PSD band (convergence per band: above
    1 in a fine band, the run added ripple).

    Example: shopdb removal part 150-0100
    """
    from shopdb.quantities import period_range
    from shopdb.services import removal

    tz, rows = read(
        home,
        lambda shop, s: (shop.settings.timezone, removal.part_removals(session=s, serial=serial)),
    )
    if as_json:
        emit_json(rows)
        return
    edges: list = next((r["ratio_bands"] for r in rows if r["ratio_bands"]), [])
    names = [period_range(lo, hi) for lo, hi in edges]
    typer.echo(
        table(
            [
                [
                    r["iteration"],
                    r["machine"],
                    r["pad"],
                    when(r["started_at"], tz),
                    _nm(r["removal_rms_nm"]),
                    None if r["depth_nm"] is None else round(r["depth_nm"]),
                    None if r["preston_per_pa"] is None else f"{r['preston_per_pa']:.3g}",
                    *[None if x is None else round(x, 2) for x in r["band_ratio"][: len(names)]],
                ]
                for r in rows
            ],
            ["run", "machine", "pad", "started", "removal RMS (nm)", "depth (nm)", "k_p (1/Pa)"]
            + [f"ratio {n}" for n in names],
        )
    )


@removal_app.command("machines")
def removal_machines(
    drawing: Annotated[str | None, typer.Option(help="Only runs on parts of this drawing.")] = None,
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Per machine: runs, mean removal RMS, the mean shape of its removal (largest Zernike
    terms) and Preston's coefficient per pad (a pad or slurry change shows as a shift).

    Example: shopdb removal machines
    """
    from shopdb.services import removal
    from shopdb.surface.zernike import name as term_name

    rows = read(home, lambda shop, s: removal.machine_removals(session=s, drawing=drawing))
    if as_json:
        emit_json(rows)
        return
    out = []
    for e in rows:
        kp = [r["preston_per_pa"] for r in e["runs"] if r["preston_per_pa"] is not None]
        pads: dict[str, list[float]] = {}
        for r in e["runs"]:
            if r["preston_per_pa"] is not None:
                pads.setdefault(r["pad"] or "-", []).append(r["preston_per_pa"])
        out.append(
            [
                e["machine"],
                len(e["runs"]),
                _nm(e["mean_removal_rms_nm"]),
                ", ".join(f"{term_name(n, m)} {c:+.1f}" for n, m, c in e["mean_shape_nm"][:3]),
                "; ".join(f"{p} {sum(v) / len(v):.3g}" for p, v in pads.items()) if kp else None,
            ]
        )
    typer.echo(
        table(
            out,
            ["machine", "runs", "mean removal RMS (nm)", "mean shape (nm)", "k_p by pad (1/Pa)"],
        )
    )


@removal_app.command("rank")
def removal_rank(
    serial: Annotated[str, typer.Argument(help="Part serial: its final measurement.")],
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Which lap for the part's next run: each full-aperture machine's recent removals on the
    drawing applied to the part's current map, the predicted irregularity mean ± spread, best
    first. A prediction from the record: it supports, never replaces, the lead's judgement.

    Example: shopdb removal rank 150-0100
    """
    from shopdb.services import removal

    rows = read(
        home, lambda shop, s: removal.rank_machines(session=s, blobs=shop.blobs, serial=serial)
    )
    if as_json:
        emit_json(rows)
        return
    if not rows:
        typer.echo(f"no full-aperture machine has two or more removals on {serial}'s drawing")
        return
    typer.echo(f"{serial}: irregularity now {rows[0]['now_irregularity_nm']:.1f} nm")
    for r in rows:
        typer.echo(
            f"  {r['machine']}: irregularity {r['irregularity_nm']:.1f} ± {r['spread_nm']:.1f} nm "
            f"(from {r['removals']} removals)"
        )


def register(app: typer.Typer) -> None:
    app.command("plan")(plan)
    app.add_typer(removal_app, name="removal")
