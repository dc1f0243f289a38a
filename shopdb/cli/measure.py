"""Measurement commands: ``shopdb analyze``, ``ingest``, ``watch``, ``reanalyze``, ``show``."""

from __future__ import annotations

import contextlib
import json
import sys
from pathlib import Path
from typing import Annotated

import typer

from shopdb.cli.common import (
    AsOpt,
    HomeOpt,
    JsonOpt,
    actor,
    emit_json,
    meta,
    opened,
    parse_time,
    read,
    table,
    when,
)
from shopdb.errors import ShopdbError
from shopdb.formats import names_help

FormatOpt = Annotated[
    str | None, typer.Option("--format", help=f"{names_help()} (default: from the extension).")
]
PixelOpt = Annotated[float | None, typer.Option("--pixel-mm", help="Pixel pitch in mm.")]
UnitsOpt = Annotated[
    str | None, typer.Option(help="Height units in the file: nm, um, waves, fringes.")
]
WavelengthOpt = Annotated[
    float | None,
    typer.Option(
        "--wavelength-nm",
        help="Test wavelength in nm (needed for maps in waves or fringes, and for fringe values).",
    ),
]
KindOpt = Annotated[
    str | None,
    typer.Option(
        help="surface, or wavefront (a reflected wavefront: reported as surface, i.e. halved)."
    ),
]


def parse_clear_aperture(text: str | None) -> dict:
    """``0.9`` (fraction of the part radius) or ``90mm`` (diameter) -> settings keywords."""
    if text is None:
        return {}
    t = text.strip().lower()
    try:
        if t.endswith("mm"):
            return {"clear_aperture_mm": float(t[:-2])}
        return {"clear_aperture_fraction": float(t)}
    except ValueError:
        raise ShopdbError(
            f"--clear-aperture {text!r}: give a fraction (0.9) or a diameter (90mm)"
        ) from None


def _summary_line(name: str, r) -> str:
    iso = r.iso10110()
    return (
        f"{name}: PV {r.pv_nm:.2f} nm  RMS {r.rms_nm:.2f} nm  PVr {r.pvr_nm:.2f} nm  "
        f"sag {iso['sag_nm']:.2f}  irr {iso['irregularity_nm']:.2f}  RSI {iso['rsi_nm']:.2f} nm  "
        f"valid {100 * r.valid_fraction:.1f} %"
    )


def analyze(
    files: Annotated[list[Path], typer.Argument(help="Height-map files.", show_default=False)],
    format: FormatOpt = None,
    pixel_mm: PixelOpt = None,
    units: UnitsOpt = None,
    wavelength_nm: WavelengthOpt = None,
    kind: KindOpt = None,
    zernike_order: Annotated[
        int, typer.Option("--zernike-order", help="Highest radial order fitted.")
    ] = 10,
    remove: Annotated[
        str, typer.Option(help="Terms removed before PV/RMS: any of piston,tilt,power, or none.")
    ] = "piston,tilt",
    clear_aperture: Annotated[
        str | None,
        typer.Option(
            "--clear-aperture", help="Fraction of the part radius (0.9) or diameter (90mm)."
        ),
    ] = None,
    aperture: Annotated[str, typer.Option(help="circular, annular or rectangular.")] = "circular",
    obscuration: Annotated[float, typer.Option(help="Annular: inner/outer radius ratio.")] = 0.0,
    edge_exclusion_mm: Annotated[
        float, typer.Option("--edge-exclusion-mm", help="Excluded band at the edge, mm.")
    ] = 0.0,
    as_json: Annotated[
        bool, typer.Option("--json", help="One JSON object per file (keys in the README).")
    ] = False,
) -> None:
    """Analyse height maps without storing them: Zernike fit, PV/RMS/PVr, ISO 10110-5
    quantities, slopes, PSD bands.

    Example: shopdb analyze part.npy --pixel-mm 0.2 --json
    """
    from shopdb.formats import FormatError, read_map
    from shopdb.surface.analysis import analyze as run_analysis
    from shopdb.surface.settings import AnalysisSettings

    terms = tuple(t.strip() for t in remove.split(",") if t.strip()) if remove != "none" else ()
    try:
        settings = AnalysisSettings(
            zernike_order=zernike_order,
            remove=terms,
            aperture=aperture,
            obscuration_fraction=obscuration,
            edge_exclusion_mm=edge_exclusion_mm,
            **parse_clear_aperture(clear_aperture),
        )
    except ValueError as exc:
        raise ShopdbError(f"analysis settings: {exc}") from None
    metadata = meta(pixel_mm, units, wavelength_nm, kind)
    failed = 0
    for path in files:
        try:
            surface = read_map(path, format=format, metadata=metadata).to_surface()
            result = run_analysis(surface, settings)
        except (FormatError, ValueError, TypeError, MemoryError) as exc:
            failed += 1
            msg = str(exc) if isinstance(exc, FormatError) else f"{path.name}: {exc}"
            typer.echo(f"shopdb: error: {' '.join(msg.split())}", err=True)
            continue
        if as_json:
            typer.echo(json.dumps({"file": str(path), **result.as_dict()}, allow_nan=True))
        else:
            typer.echo(_summary_line(path.name, result))
            for note in result.as_dict()["notes"]:
                typer.echo(f"  note: {note}")
    if failed:
        raise typer.Exit(2)


def ingest(
    files: Annotated[list[Path], typer.Argument(help="Measurement files.", show_default=False)],
    part: Annotated[str, typer.Option("--part", help="Part serial.")],
    station: Annotated[str, typer.Option("--station", help="Measurement station name.")],
    run: Annotated[
        int | None,
        typer.Option("--run", help="Polishing iteration (default: the part's latest run)."),
    ] = None,
    operator: Annotated[
        str | None, typer.Option(help="Operator who measured (default: the acting user).")
    ] = None,
    measured_at: Annotated[
        str | None, typer.Option("--measured-at", help="ISO 8601 time with zone (default: now).")
    ] = None,
    format: FormatOpt = None,
    pixel_mm: PixelOpt = None,
    units: UnitsOpt = None,
    wavelength_nm: WavelengthOpt = None,
    kind: KindOpt = None,
    subtract_reference: Annotated[
        bool | None,
        typer.Option(
            "--subtract-reference/--no-subtract-reference",
            help="Subtract the reference calibration's error (default: the station profile's).",
        ),
    ] = None,
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Ingest measurement files for one part: read, analyse, judge, store; duplicates are
    recognised; a refused file does not stop the batch.

    Example: shopdb ingest 100-0600_r3.x3p --part 100-0600 --station "Bench North" --measured-at 2026-11-20T14:05:00Z --as operator
    """
    from shopdb.services.ingest import ingest_files
    from shopdb.services.users import operator_account

    t = parse_time(measured_at, "--measured-at")
    with opened(home) as shop:
        user = actor(shop, as_user)
        op = None
        if operator:
            with shop.read() as s:
                op = operator_account(session=s, username=operator)
        with typer.progressbar(
            length=len(files), label="ingesting", file=sys.stderr, hidden=len(files) < 2
        ) as bar:
            report = ingest_files(
                shop=shop,
                actor=user,
                paths=files,
                part_serial=part,
                station_name=station,
                run_iteration=run,
                operator=op,
                measured_at=t,
                format=format,
                metadata=meta(pixel_mm, units, wavelength_nm, kind),
                subtract_reference=subtract_reference,
                on_file=lambda *_: bar.update(1),
            )
    if len(files) == 1 and report.outcomes:
        typer.echo(report.outcomes[0].message)
    for _, reason in report.refused:
        typer.echo(f"shopdb: error: {reason}", err=True)
    if len(files) > 1:
        typer.echo(report.summary())
    if report.refused:
        raise typer.Exit(2)


def watch(
    folder: Annotated[Path, typer.Argument(help="Folder the station writes its maps to.")],
    station: Annotated[
        str, typer.Option("--station", help="Station name (its profile supplies the metadata).")
    ],
    pattern: Annotated[
        str | None, typer.Option(help="Regex with a group 'serial' matched on the file name.")
    ] = None,
    interval: Annotated[float, typer.Option(help="Seconds between polls.")] = 2.0,
    settle: Annotated[
        float, typer.Option(help="Seconds a file must be unchanged before it is taken.")
    ] = 2.0,
    once: Annotated[
        bool, typer.Option("--once", help="Take what is there now, then exit.")
    ] = False,
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    r"""Ingest files as they appear; move them to done/ or rejected/ (with a .reason.txt).

    Example: SHOPDB_USER=operator SHOPDB_PASSWORD_FILE=/etc/shopdb/bench.pw shopdb watch /data/bench-north --station "Bench North" --pattern "^(?P<serial>\d{3}-\d{4})_"
    """
    from shopdb.services.watch import watcher_for

    with opened(home) as shop:
        user = actor(shop, as_user)
        w = watcher_for(
            shop=shop, actor=user, folder=folder, station=station, pattern=pattern, settle_s=settle
        )
        typer.echo(f"watching {folder} for station {station} (Ctrl-C stops)", err=True)
        with contextlib.suppress(KeyboardInterrupt):
            w.run(interval_s=interval, once=once, report=lambda t: typer.echo(f"{t[0]}: {t[2]}"))


def reanalyze(
    settings_json: Annotated[
        str, typer.Option("--settings", help="Analysis settings as JSON, or @file.json.")
    ],
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Add results with new analysis settings to every stored map that lacks them; old results
    stay. Commits in batches, so it can be stopped and started again.

    Example: shopdb reanalyze --settings '{"remove": ["piston", "tilt", "power"], "zernike_order": 8}'
    """
    from shopdb.services.ingest import reanalyze_all
    from shopdb.surface.settings import AnalysisSettings

    try:
        text = (
            Path(settings_json[1:]).read_text() if settings_json.startswith("@") else settings_json
        )
        settings = AnalysisSettings.from_dict(json.loads(text))
    except (OSError, json.JSONDecodeError, TypeError, ValueError, AttributeError) as exc:
        raise ShopdbError(f"--settings: {exc}") from None
    with opened(home) as shop:
        user = actor(shop, as_user)
        added, skipped = reanalyze_all(shop=shop, actor=user, settings=settings)
    typer.echo(
        f"{added} results added, {skipped} maps already had them (settings {settings.digest[:12]})"
    )


def show(
    what: Annotated[str, typer.Argument(help="A measurement id, or a part serial (its latest).")],
    terms: Annotated[int, typer.Option(help="Zernike terms to list (largest first).")] = 10,
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """One stored measurement: its part, station, PV, RMS, callout fields, Zernike terms and
    verdict (a part serial shows its latest measurement).

    Example: shopdb show 150-0100
    """
    from shopdb.services.reads.pages import measurement_summary

    tz, d = read(
        home, lambda shop, s: (shop.settings.timezone, measurement_summary(session=s, ref=what))
    )
    if as_json:
        emit_json({k: v for k, v in d.items() if k not in ("quantities", "map_nm")})
        return
    v = d["verdict"]
    typer.echo(
        f"measurement {d['id']} of part {d['part']} ({d['drawing']}), {when(d['measured_at'], tz)} "
        f"on {d['station']}; run {d['iteration'] or '-'} on {d['machine'] or '-'}"
    )
    typer.echo(f"callout {d['callout']}")
    typer.echo(
        f"verdict: {v.verdict.upper()}" + (f" ({'; '.join(v.reasons)})" if v.reasons else "")
    )
    if v.fields:
        typer.echo(f"decision rule {v.fields[0].rule}; U expanded with k = 2")
        typer.echo(
            table(
                [
                    (
                        f.quantity.label,
                        None if f.measured is None else abs(f.measured),
                        f.U,
                        f.limit,
                        f.quantity.unit,
                        f.zone or "",
                        "pass" if f.passed else "FAIL",
                    )
                    for f in v.fields
                ],
                ["field", "measured", "U", "limit", "unit", "zone", "result"],
            )
        )
    if v.test_field:
        tf = v.test_field
        typer.echo(
            f"test field Ø {tf.diameter_mm:g} mm: worst of {tf.sub_apertures} sub-apertures"
            if not tf.error
            else f"test field Ø {tf.diameter_mm:g} mm: {tf.error}"
        )
    typer.echo(
        table(
            [(q.label, d["result"][q.name], q.unit) for q in d["quantities"]],
            ["quantity", "value", "unit"],
        )
    )
    z = sorted(d["zernike"], key=lambda t: -abs(t["coef_nm"]))[:terms]
    if z:
        typer.echo(
            table(
                [(f"Z({t['n']},{t['m']})", t["term"], t["coef_nm"]) for t in z],
                ["term", "name", "coefficient (nm)"],
            )
        )


def register(app: typer.Typer) -> None:
    for fn in (analyze, ingest, watch, reanalyze, show):
        app.command(fn.__name__)(fn)
