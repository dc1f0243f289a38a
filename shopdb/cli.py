"""The ``shopdb`` command line. Each command is one service call; a :class:`ShopdbError`
becomes one line on stderr and exit code 2."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Annotated

import typer

from shopdb import __version__
from shopdb.cli_common import (
    AsOpt,
    HomeOpt,
    _actor,
    _echo_json,
    _meta,
    _open,
    _parse_time,
    _settings,
)
from shopdb.errors import ShopdbError

app = typer.Typer(
    name="shopdb",
    help="Surface-figure records and SPC for an optical polishing shop.",
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    add_completion=False,
    context_settings={"help_option_names": ["-h", "--help"]},
)
db_app = typer.Typer(help="Database schema commands.", no_args_is_help=True)
app.add_typer(db_app, name="db")


def _version(value: bool) -> None:
    if value:
        typer.echo(f"shopdb {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: Annotated[
        bool,
        typer.Option(
            "--version", callback=_version, is_eager=True, help="Print the version and exit."
        ),
    ] = False,
) -> None:
    """Surface-figure records and SPC for an optical polishing shop.

    Example: shopdb init --home ./shop && shopdb --help
    """


@app.command()
def init(home: HomeOpt = None) -> None:
    """Create the home folder, the blob folder and a migrated database.

    Example: shopdb init --home /srv/shopdb
    """
    from shopdb.db import migrate, open_database

    settings = _settings(home)
    if settings.is_sqlite:
        if settings.home.exists() and not settings.home.is_dir():
            raise ShopdbError(f"shopdb home {settings.home} exists and is not a folder")
        settings.home.mkdir(parents=True, exist_ok=True)
    settings.blob_dir.mkdir(parents=True, exist_ok=True)
    open_database(settings, require_current=False).dispose()
    migrate(settings.database_url)
    typer.echo(
        f"shopdb home {settings.home} ready (database {settings.database_url}, blobs {settings.blob_dir})"
    )


@db_app.command("upgrade")
def db_upgrade(
    home: HomeOpt = None,
    revision: Annotated[str, typer.Option(help="Target revision.")] = "head",
) -> None:
    """Run the schema migrations up to REVISION (default: the newest).

    Example: SHOPDB_DATABASE_URL=postgresql+psycopg://shop@dbhost/shopdb shopdb db upgrade
    """
    from shopdb.db import current_revision, migrate, open_database

    settings = _settings(home)
    engine = open_database(settings, require_current=False)
    before = current_revision(engine)
    engine.dispose()
    migrate(settings.database_url, revision)
    engine = open_database(settings, require_current=False)
    typer.echo(f"schema revision {before or 'none'} -> {current_revision(engine)}")
    engine.dispose()


@db_app.command("current")
def db_current(home: HomeOpt = None) -> None:
    """Print the database's schema revision and the newest one this version knows.

    Example: shopdb db current
    """
    from shopdb.db import current_revision, head_revision, open_database

    engine = open_database(_settings(home), require_current=False)
    typer.echo(f"database at {current_revision(engine) or 'none'}; newest {head_revision()}")
    engine.dispose()


@app.command()
def check(
    home: HomeOpt = None,
    fix: Annotated[
        bool, typer.Option("--fix", help="Remove orphan blobs (older than 10 minutes).")
    ] = False,
    as_json: Annotated[bool, typer.Option("--json", help="Print the report as JSON.")] = False,
) -> None:
    """Check that every referenced height map exists and matches its hash, list orphan
    blobs, and walk the audit chain. Exit 1 if anything is wrong.

    Example: shopdb check --fix
    """
    from shopdb.blobs import BlobStore
    from shopdb.db import open_database, read_session
    from shopdb.services.health import check as run_check

    settings = _settings(home)
    engine = open_database(settings)
    with read_session(engine) as session:
        report = run_check(session=session, blobs=BlobStore(settings.blob_dir), fix=fix)
    engine.dispose()
    if as_json:
        _echo_json(report.as_dict())
    else:
        typer.echo(f"blobs: {report.referenced} referenced, {report.stored} stored")
        for label, keys in (
            ("missing", report.missing),
            ("corrupt", report.corrupt),
            ("orphan", report.orphans),
            ("removed", report.removed),
        ):
            for key in keys:
                typer.echo(f"{label}: {key}")
        for p in report.stray_temp_files:
            typer.echo(f"interrupted write: {p}")
        typer.echo(f"audit chain: {report.audit_events} events, {report.audit_problem or 'intact'}")
        typer.echo("healthy" if report.healthy else "NOT healthy")
    if not report.healthy:
        raise typer.Exit(1)


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


def settings_from_options(
    *,
    zernike_order: int,
    remove: str,
    clear_aperture: str | None,
    aperture: str,
    obscuration: float,
    edge_exclusion_mm: float,
):
    from shopdb.surface.analysis import AnalysisSettings

    terms = tuple(t.strip() for t in remove.split(",") if t.strip()) if remove != "none" else ()
    try:
        return AnalysisSettings(
            zernike_order=zernike_order,
            remove=terms,
            aperture=aperture,
            obscuration_fraction=obscuration,
            edge_exclusion_mm=edge_exclusion_mm,
            **parse_clear_aperture(clear_aperture),
        )
    except ValueError as exc:
        raise ShopdbError(f"analysis settings: {exc}") from None


def _summary_line(name: str, r) -> str:
    iso = r.iso10110()
    return (
        f"{name}: PV {r.pv_nm:.2f} nm  RMS {r.rms_nm:.2f} nm  PVr {r.pvr_nm:.2f} nm  "
        f"sag {iso['sag_nm']:.2f}  irr {iso['irregularity_nm']:.2f}  RSI {iso['rsi_nm']:.2f} nm  "
        f"valid {100 * r.valid_fraction:.1f} %"
    )


@app.command()
def analyze(
    files: Annotated[list[Path], typer.Argument(help="Height-map files.", show_default=False)],
    format: Annotated[
        str | None, typer.Option("--format", help="npy, npz or text (default: from the extension).")
    ] = None,
    pixel_mm: Annotated[float | None, typer.Option("--pixel-mm", help="Pixel pitch in mm.")] = None,
    units: Annotated[
        str | None, typer.Option(help="Height units in the file: nm, um, waves, fringes.")
    ] = None,
    wavelength_nm: Annotated[
        float | None, typer.Option("--wavelength-nm", help="Test wavelength in nm.")
    ] = None,
    kind: Annotated[
        str | None,
        typer.Option(
            help="surface, or wavefront (a reflected wavefront: reported as surface, i.e. halved)."
        ),
    ] = None,
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
    """Analyse height maps: Zernike fit, PV/RMS/PVr, ISO 10110-5 quantities, slopes, PSD bands.

    Example: shopdb analyze part.npy --pixel-mm 0.2 --wavelength-nm 632.8 --json
    """
    from shopdb.formats import FormatError, read_map
    from shopdb.surface.analysis import analyze as run_analysis

    settings = settings_from_options(
        zernike_order=zernike_order,
        remove=remove,
        clear_aperture=clear_aperture,
        aperture=aperture,
        obscuration=obscuration,
        edge_exclusion_mm=edge_exclusion_mm,
    )
    meta = _meta(pixel_mm, units, wavelength_nm, kind)
    failed = 0
    for path in files:
        try:
            surface = read_map(path, format=format, metadata=meta).to_surface()
            result = run_analysis(surface, settings)
        except (FormatError, ValueError) as exc:
            failed += 1
            msg = str(exc) if isinstance(exc, FormatError) else f"{path.name}: {exc}"
            typer.echo(f"shopdb: error: {msg}", err=True)
            continue
        if as_json:
            typer.echo(json.dumps({"file": str(path), **result.as_dict()}, allow_nan=True))
        else:
            typer.echo(_summary_line(path.name, result))
    if failed:
        raise typer.Exit(2)


@app.command()
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
    format: Annotated[
        str | None, typer.Option("--format", help="x3p, npy, npz, text, tiff, hdf5.")
    ] = None,
    pixel_mm: Annotated[float | None, typer.Option("--pixel-mm", help="Pixel pitch in mm.")] = None,
    units: Annotated[str | None, typer.Option(help="nm, um, waves, fringes.")] = None,
    wavelength_nm: Annotated[
        float | None, typer.Option("--wavelength-nm", help="Test wavelength, nm.")
    ] = None,
    kind: Annotated[str | None, typer.Option(help="surface or wavefront.")] = None,
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
    """Ingest measurement files for one part: read, analyse, store; duplicates are recognised.

    Example: shopdb ingest W-0001_r3.x3p --part W-0001 --station "Bench 1" --measured-at 2026-03-01T14:05:00Z
    """
    from sqlmodel import select

    from shopdb.models import Station
    from shopdb.services.ingest import ingest as run_ingest
    from shopdb.services.ingest import read_ahead, subtracts_reference

    shop = _open(home)
    when = _parse_time(measured_at, "--measured-at")
    meta = _meta(pixel_mm, units, wavelength_nm, kind)
    tally = {"ingested": 0, "duplicate": 0, "rejected": 0}
    reasons = []
    with shop.write() as session:
        actor = _actor(session, as_user)
        op = None
        if operator:
            from shopdb.services.users import get_user

            op = get_user(session=session, username=operator)
        st = session.exec(select(Station).where(Station.name == station)).first()
    # a reference-subtracted map is stored instead of the file's: nothing to encode ahead then
    encode_blob = st is None or not subtracts_reference(st, subtract_reference)
    batch = read_ahead(
        files, st, format=format, metadata=meta, blobs=shop.blobs, encode_blob=encode_blob
    )
    with typer.progressbar(
        batch, length=len(files), label="ingesting", file=sys.stderr, hidden=len(files) < 2
    ) as bar:
        for path, prefetched in bar:
            try:
                read = prefetched()
                with shop.write() as session:
                    out = run_ingest(
                        session=session,
                        blobs=shop.blobs,
                        actor=actor,
                        path=path,
                        part_serial=part,
                        station_name=station,
                        run_iteration=run,
                        operator=op,
                        measured_at=when,
                        format=format,
                        metadata=meta,
                        subtract_reference=subtract_reference,
                        prefetched=read,
                    )
                tally[out.status] += 1
                if len(files) == 1:
                    typer.echo(out.message)
            except ShopdbError as exc:
                tally["rejected"] += 1
                reasons.append(str(exc))
    for r in reasons:
        typer.echo(f"shopdb: error: {r}", err=True)
    if len(files) > 1:
        typer.echo(
            f"{tally['ingested']} ingested, {tally['duplicate']} duplicate, {tally['rejected']} rejected"
        )
    shop.engine.dispose()
    if tally["rejected"]:
        raise typer.Exit(2)


@app.command()
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

    Example: SHOPDB_USER=bench1 shopdb watch /data/bench1 --station "Bench 1" --pattern "^(?P<serial>W-\d+)_"
    """
    from shopdb.models import Station
    from shopdb.services.ingest import ingest as run_ingest
    from shopdb.services.masterdata import get_by
    from shopdb.services.watch import DEFAULT_PATTERN, Watcher

    shop = _open(home)
    with shop.write() as session:
        actor = _actor(session, as_user)
        st = get_by(session, Station, "name", station, "station")
        pattern = pattern or st.profile.get("serial_pattern") or DEFAULT_PATTERN

    def take(path: Path, serial: str) -> str:
        with shop.write() as session:
            return run_ingest(
                session=session,
                blobs=shop.blobs,
                actor=actor,
                path=path,
                part_serial=serial,
                station_name=station,
            ).message

    watcher = Watcher(folder, take, pattern=pattern, settle_s=settle)
    typer.echo(f"watching {folder} for station {station} (Ctrl-C stops)", err=True)
    try:
        watcher.run(interval_s=interval, once=once, report=lambda t: typer.echo(f"{t[1]}: {t[2]}"))
    except KeyboardInterrupt:
        pass
    finally:
        shop.engine.dispose()


@app.command()
def reanalyze(
    settings_json: Annotated[
        str, typer.Option("--settings", help="Analysis settings as JSON, or @file.json.")
    ],
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Add results with new analysis settings to every stored map that lacks them; old results stay.

    Example: shopdb reanalyze --settings '{"remove": ["piston", "tilt", "power"], "zernike_order": 8}'
    """
    from shopdb.services.ingest import reanalyze as run
    from shopdb.surface.analysis import AnalysisSettings

    text = Path(settings_json[1:]).read_text() if settings_json.startswith("@") else settings_json
    try:
        settings = AnalysisSettings.from_dict(json.loads(text))
    except (json.JSONDecodeError, TypeError, ValueError) as exc:
        raise ShopdbError(f"--settings: {exc}") from None
    shop = _open(home)
    with shop.write() as session:
        actor = _actor(session, as_user)
        added, skipped = run(session=session, blobs=shop.blobs, actor=actor, settings=settings)
    typer.echo(
        f"{added} results added, {skipped} maps already had them (settings {settings.digest[:12]})"
    )


def streamlit_command(port: int, address: str) -> list[str]:
    """The Streamlit invocation with the server settings for a shop network."""
    from importlib import import_module

    app_path = Path(import_module("shopdb.ui").__file__).parent / "app.py"
    return [
        sys.executable,
        "-m",
        "streamlit",
        "run",
        str(app_path),
        "--server.headless",
        "true",
        "--server.address",
        address,
        "--server.port",
        str(port),
        "--server.fileWatcherType",
        "none",
        "--server.enableXsrfProtection",
        "true",
        "--server.maxUploadSize",
        "64",
        "--browser.gatherUsageStats",
        "false",
        "--client.toolbarMode",
        "viewer",
        "--client.showErrorDetails",
        "false",
        "--theme.base",
        "light",
    ]


def run_ui(settings, *, port: int, address: str, open_browser: bool) -> None:
    from shopdb.db import open_database

    open_database(settings).dispose()  # one-line error now, not a traceback in the browser
    env = {
        **os.environ,
        "SHOPDB_HOME": str(settings.home),
        "SHOPDB_DATABASE_URL": settings.database_url,
        "SHOPDB_BLOB_DIR": str(settings.blob_dir),
    }
    url = f"http://{address}:{port}"
    typer.echo(f"shopdb app on {url}  (Ctrl-C stops it)")
    if open_browser:
        import threading
        import webbrowser

        threading.Timer(3.0, lambda: webbrowser.open(url)).start()
    try:
        rc = subprocess.call(streamlit_command(port, address), env=env)
    except KeyboardInterrupt:
        rc = 0
    if rc:
        raise ShopdbError(f"the app server stopped with exit code {rc}")


@app.command()
def ui(
    home: HomeOpt = None,
    port: Annotated[int, typer.Option(help="TCP port.")] = 8501,
    address: Annotated[
        str, typer.Option(help="Address to listen on; 0.0.0.0 for the shop network.")
    ] = "127.0.0.1",
) -> None:
    """Start the web app (headless-safe: usage statistics off, file watcher off, XSRF on).

    Example: shopdb ui --address 0.0.0.0 --port 8501
    """
    run_ui(_settings(home), port=port, address=address, open_browser=False)


@app.command()
def demo(
    home: Annotated[
        Path | None,
        typer.Option("--home", help="Demo folder (default: ~/.local/share/shopdb-demo)."),
    ] = None,
    fresh: Annotated[bool, typer.Option("--fresh", help="Delete and rebuild the demo.")] = False,
    no_browser: Annotated[
        bool, typer.Option("--no-browser", help="Do not open a browser.")
    ] = False,
    build_only: Annotated[
        bool, typer.Option("--build-only", help="Build the demo and exit.")
    ] = False,
    size: Annotated[str, typer.Option(help="full, or small (a reduced shop for tests).")] = "full",
    port: Annotated[int, typer.Option(help="TCP port of the app.")] = 8501,
) -> None:
    """Build the fictional demo shop in its own folder (never your real database) and open the app.

    Example: shopdb demo --fresh
    """
    from shopdb.config import load_settings
    from shopdb.seed_demo.build import SHOP_NAME, build_demo, default_demo_home

    os.environ.setdefault("SHOPDB_SHOP_NAME", SHOP_NAME)
    demo_home = (home or default_demo_home()).expanduser()
    settings = load_settings(demo_home)
    summary = build_demo(settings, fresh=fresh, size=size)
    typer.echo(summary)
    if not build_only:
        run_ui(settings, port=port, address="127.0.0.1", open_browser=not no_browser)


from shopdb import (  # noqa: E402  (sub-commands register on the app above)
    cli_lab,
    cli_records,
    cli_release,
    cli_spc,
)

cli_lab.register(app)
cli_records.register(app)
cli_release.register(app)
cli_spc.register(app)


def main() -> None:
    try:
        # with standalone_mode=False, click returns the code of a typer.Exit instead of raising it
        rc = app(standalone_mode=False)
        sys.exit(rc if isinstance(rc, int) else 0)
    except ShopdbError as exc:
        typer.echo(f"shopdb: error: {exc}", err=True)
        sys.exit(2)
    except typer.Exit as exc:
        sys.exit(exc.exit_code)
    except typer.Abort:
        typer.echo("shopdb: aborted", err=True)
        sys.exit(130)
    except Exception as exc:
        # usage errors (unknown command, bad option value) from typer's click layer
        if hasattr(exc, "show") and hasattr(exc, "exit_code"):
            exc.show()
            sys.exit(2)
        raise


if __name__ == "__main__":
    main()
