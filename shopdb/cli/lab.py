"""Metrology-lab commands: ``shopdb calibrate three-flat`` and ``shopdb msa``."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from shopdb.cli.common import (
    AsOpt,
    HomeOpt,
    JsonOpt,
    actor,
    as_actor,
    emit_json,
    meta,
    opened,
    parse_time,
)
from shopdb.errors import ShopdbError

calibrate_app = typer.Typer(
    help="Absolute calibration of reference optics (metrology).", no_args_is_help=True
)

FileList = Annotated[list[Path], typer.Option(help="Map file(s); repeat the option for repeats.")]


@calibrate_app.command("three-flat")
def three_flat(
    ab: FileList,
    ac: FileList,
    bc: FileList,
    ab_rot: Annotated[
        list[Path], typer.Option("--ab-rot", help="AB with A turned by --angle; repeatable.")
    ],
    references: Annotated[
        str, typer.Option(help="The three reference optics, as flats A,B,C (comma separated).")
    ],
    angle: Annotated[float, typer.Option(help="Rotation of A in --ab-rot, degrees CCW.")] = 90.0,
    flip_axis: Annotated[
        str, typer.Option(help="Axis the second flat is turned over about: x or y.")
    ] = "y",
    order: Annotated[int, typer.Option(help="Zernike radial order solved.")] = 8,
    valid_days: Annotated[float, typer.Option(help="Days the calibrations stay valid.")] = 90.0,
    calibrated_at: Annotated[
        str | None, typer.Option(help="ISO 8601 time of the calibration (default now).")
    ] = None,
    report: Annotated[
        Path | None, typer.Option(help="Write a report of the solved maps: .html or .pdf.")
    ] = None,
    format: Annotated[str | None, typer.Option(help="Map format (default: by extension).")] = None,
    pixel_mm: Annotated[float | None, typer.Option(help="Pixel pitch, mm.")] = None,
    units: Annotated[str | None, typer.Option(help="nm, um, waves or fringes.")] = None,
    wavelength_nm: Annotated[float | None, typer.Option(help="Test wavelength, nm.")] = None,
    kind: Annotated[str | None, typer.Option(help="surface or wavefront.")] = None,
    home: HomeOpt = None,
    as_user: AsOpt = None,
) -> None:
    """Solve three reference flats from a three-flat test and record one calibration each.

    Example: shopdb calibrate three-flat --ab ab.x3p --ac ac.x3p --bc bc.x3p --ab-rot ab90.x3p --angle 90 --flip-axis y --references TF-A,TF-B,TF-C --report cal.html --as metrology
    """
    from shopdb.services import metrology

    refs = [r.strip() for r in references.split(",")]
    if report is not None:
        import os

        if report.suffix.lower() not in (".html", ".htm", ".pdf"):
            raise ShopdbError(f"--report {report}: the file must end in .html or .pdf")
        folder = report.parent if str(report.parent) else Path(".")
        if not folder.is_dir() or not os.access(folder, os.W_OK):
            raise ShopdbError(
                f"--report {report}: folder {folder} does not exist or is not writable"
            )
    when = parse_time(calibrated_at, "--calibrated-at")
    with opened(home) as shop:
        user = actor(shop, as_user)
        with shop.write() as session:
            cals, sol = metrology.calibrate_three_flat(
                session=session,
                blobs=shop.blobs,
                actor=user,
                files={"ab": [*ab], "ac": [*ac], "bc": [*bc], "ab_rot": [*ab_rot]},
                references=refs,
                angle_deg=angle,
                flip_axis=flip_axis,
                order=order,
                calibrated_at=when,
                valid_days=valid_days,
                metadata=meta(pixel_mm, units, wavelength_nm, kind),
                format=format,
            )
            ids = [int(c.id or 0) for c in cals]
            body = None
            if report is not None:
                body = (
                    metrology.report_pdf(sol, refs, ids)
                    if report.suffix.lower() == ".pdf"
                    else metrology.report_html(sol, refs, ids).encode()
                )
    if body is not None and report is not None:
        try:
            report.write_bytes(body)
        except OSError as exc:
            raise ShopdbError(
                f"calibrations {ids} recorded, but the report {report} could not be written: "
                f"{exc.strerror}"
            ) from None
    for flat, ref, c in zip("ABC", refs, cals, strict=True):
        typer.echo(
            f"{flat} = {ref}: calibration {c.id}, PV {c.pv_nm:.2f} nm, RMS {c.rms_nm:.2f} nm, "
            f"u = {c.uncertainty_nm:.3f} nm"
        )
    if sol.undetermined:
        typer.echo(
            "undetermined by this measurement set: "
            + ", ".join(f"Z({n},{m})" for n, m in sol.undetermined)
        )
    if report is not None:
        typer.echo(f"report: {report}")


def msa_command(
    study: Annotated[Path, typer.Argument(help="CSV with columns part, operator, trial, value.")],
    tolerance: Annotated[
        float | None,
        typer.Option(help="Tolerance width (same unit as the values) for %GRR of tolerance."),
    ] = None,
    record: Annotated[
        str | None,
        typer.Option(
            "--record",
            help="Keep the study for this station (metrology): its reproducibility then enters "
            "the uncertainty of the station's measurements of --quantity.",
        ),
    ] = None,
    quantity: Annotated[
        str | None, typer.Option(help="The quantity studied (a metric name, e.g. irregularity_nm).")
    ] = None,
    as_json: JsonOpt = False,
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Gage R&R of a crossed study by the average-and-range and ANOVA methods (AIAG MSA, 4th ed.);
    with --record, kept for a station and quantity.

    Example: shopdb msa bench-north-grr.csv --tolerance 30 --record "Bench North" --quantity irregularity_nm --as metrology
    """
    from shopdb.services.metrology import gage_study, record_gage_study

    try:
        data = study.read_bytes()
    except OSError as exc:
        raise ShopdbError(f"{study.name}: {exc.strerror}") from None
    g_study = gage_study(data, name=study.name, tolerance=tolerance)
    results = g_study.results
    if record is not None:
        if quantity is None:
            raise ShopdbError("--record needs the --quantity the study measured")
        row = as_actor(
            home,
            as_user,
            lambda shop, s, a: record_gage_study(
                session=s,
                actor=a,
                study=g_study,
                station=record,
                quantity=quantity,
                source_name=study.name,
            ),
        )
        typer.echo(f"gage study {row.id} recorded for {record}, {row.quantity}")
    if as_json:
        emit_json([r.as_dict() for r in results])
        return
    k, n, r = g_study.shape
    typer.echo(f"{study.name}: {n} parts x {k} operators x {r} trials")
    for g in results:
        tol = f", {g.pct_grr_tolerance:.1f} % of tolerance" if g.pct_grr_tolerance else ""
        typer.echo(
            f"  {g.method:<18} EV {g.ev:.4g} ({g.pct_ev:.1f} %), AV {g.av:.4g} ({g.pct_av:.1f} %), "
            f"GRR {g.grr:.4g} ({g.pct_grr:.1f} %{tol}), PV {g.pv:.4g} ({g.pct_pv:.1f} %), "
            f"ndc {g.ndc}: {g.verdict}"
        )


def register(app: typer.Typer) -> None:
    app.add_typer(calibrate_app, name="calibrate")
    app.command("msa")(msa_command)
