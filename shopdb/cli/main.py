"""The ``shopdb`` command line: the root, set-up and server commands, and ``main``.

Each command calls services; a :class:`ShopdbError` becomes one line on stderr and exit code 2.
Commands that only read need no password (viewing is every role's right); commands that change
records authenticate the acting user (``--as`` / ``SHOPDB_USER``).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path
from typing import Annotated

import typer

from shopdb import __version__
from shopdb.cli.common import HomeOpt, JsonOpt, emit_json, opened, settings
from shopdb.errors import ShopdbError

app = typer.Typer(
    name="shopdb",
    help="Surface-figure records and SPC for an optical polishing shop.",
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    add_completion=False,
    rich_markup_mode=None,
    context_settings={"help_option_names": ["-h", "--help"]},
)
db_app = typer.Typer(help="Database schema commands.", no_args_is_help=True)
app.add_typer(db_app, name="db")

NEXT_STEPS = """\
Next steps:
  1. the first account (an admin; no --as for the very first):
       SHOPDB_NEW_PASSWORD=... shopdb user add ada --role admin --name "A. Admin"{home}
  2. a reference optic and its calibration:
       shopdb add reference TF-1 --diameter-mm 150 --as ada{home}
       shopdb add calibration TF-1 --at 2026-01-05T10:00Z --valid-until 2026-04-05T10:00Z --method three-flat --uncertainty-nm 1.2 --as ada{home}
  3. a station and the check standard it measures every shift (a release needs it in control):
       shopdb add drawing CHECK-STANDARD --revision A --callout "3/1(0.5)" --wavelength-nm 632.8 --clear-aperture-mm 90 --as ada{home}
       shopdb add part CS-1 --drawing CHECK-STANDARD --as ada{home}
       shopdb add station "Bench 1" --wavelength-nm 632.8 --reference TF-1 --check-standard CS-1 --as ada{home}
  4. a drawing, a lot and its parts:
       shopdb add drawing KR-100-W --revision A --callout "3/0.5(0.1); λ = 632.8 nm" --wavelength-nm 632.8 --clear-aperture-mm 90 --as ada{home}
       shopdb add lot L-0001 --drawing KR-100-W --as ada{home}
       shopdb add part W-0001 --drawing KR-100-W --lot L-0001 --as ada{home}
  5. ingest a measurement:
       shopdb ingest W-0001_run1.x3p --part W-0001 --station "Bench 1" --as ada{home}
"""


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
    """Create the home folder, the blob folder and a migrated database; print the next steps.

    Example: shopdb init --home /srv/shopdb
    """
    from shopdb.services.session import create_shop

    s = settings(home)
    create_shop(s)
    typer.echo(f"shopdb home {s.home} ready (database {s.database_url}, blobs {s.blob_dir})")
    typer.echo(NEXT_STEPS.format(home=f" --home {home}" if home else ""))


@db_app.command("upgrade")
def db_upgrade(
    home: HomeOpt = None,
    revision: Annotated[str, typer.Option(help="Target revision.")] = "head",
) -> None:
    """Run the schema migrations up to REVISION (default: the newest); results stored before
    their verdict was kept are judged against their drawings.

    Example: SHOPDB_DATABASE_URL=postgresql+psycopg://shop@dbhost/shopdb shopdb db upgrade
    """
    from shopdb.services.session import upgrade_schema

    before, now, judged = upgrade_schema(settings(home), revision)
    typer.echo(f"schema revision {before or 'none'} -> {now}")
    if judged:
        typer.echo(f"{judged} stored results judged against their drawings")


@db_app.command("current")
def db_current(home: HomeOpt = None) -> None:
    """Print the database's schema revision and the newest one this version knows.

    Example: shopdb db current
    """
    from shopdb.services.session import schema_revisions

    now, head = schema_revisions(settings(home))
    typer.echo(f"database at {now or 'none'}; newest {head}")


@app.command()
def check(
    home: HomeOpt = None,
    fix: Annotated[
        bool, typer.Option("--fix", help="Remove orphan blobs (older than 10 minutes).")
    ] = False,
    as_json: JsonOpt = False,
) -> None:
    """Check that every referenced height map exists and matches its hash, list orphan
    blobs, walk the audit chain and verify every signed lot. Exit 1 if anything is wrong.

    Example: shopdb check --fix
    """
    from shopdb.services.health import check as run_check

    with opened(home) as shop:
        report = run_check(shop=shop, fix=fix)
    if as_json:
        emit_json(report.as_dict())
    else:
        typer.echo(report.text())
    if not report.healthy:
        raise typer.Exit(1)


def streamlit_command(port: int, address: str) -> list[str]:
    """The Streamlit invocation with the server settings for a shop network."""
    from importlib import import_module

    app_path = Path(import_module("shopdb.ui").__file__ or "").parent / "app.py"
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
        "none",
        "--theme.base",
        "light",
    ]


def run_ui(s, *, port: int, address: str, open_browser: bool) -> None:
    """Serve the app in a child process; SIGINT/SIGTERM are passed on and the child waited for."""
    from shopdb.services.session import check_database, check_serving

    check_database(s)  # one-line error now, not a traceback in the browser
    check_serving(s, address)
    env = {
        **os.environ,
        "SHOPDB_HOME": str(s.home),
        "SHOPDB_DATABASE_URL": s.database_url,
        "SHOPDB_BLOB_DIR": str(s.blob_dir),
    }
    url = f"http://{address}:{port}"
    typer.echo(f"shopdb app on {url}  (Ctrl-C stops it)")
    if open_browser:
        import threading
        import webbrowser

        threading.Timer(3.0, lambda: webbrowser.open(url)).start()
    child = subprocess.Popen(streamlit_command(port, address), env=env)

    def forward(signum, _frame):
        if child.poll() is None:
            child.send_signal(signum)

    old = {sig: signal.signal(sig, forward) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        try:
            rc = child.wait()
        except KeyboardInterrupt:
            rc = 0
        finally:
            if child.poll() is None:
                child.terminate()
                try:
                    child.wait(20)
                except subprocess.TimeoutExpired:
                    child.kill()
                    child.wait()
    finally:
        for sig, handler in old.items():
            signal.signal(sig, handler)
    if rc not in (0, -signal.SIGINT, -signal.SIGTERM):
        raise ShopdbError(f"the app server stopped with exit code {rc}")


@app.command()
def ui(
    home: HomeOpt = None,
    port: Annotated[int, typer.Option(help="TCP port.")] = 8501,
    address: Annotated[
        str, typer.Option(help="Address to listen on; 0.0.0.0 for the shop network.")
    ] = "127.0.0.1",
) -> None:
    """Start the web app (usage statistics off, file watcher off, XSRF on, error details hidden).

    Example: shopdb ui --address 0.0.0.0 --port 8501
    """
    run_ui(settings(home), port=port, address=address, open_browser=False)


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
    s = load_settings(demo_home)
    typer.echo(build_demo(s, fresh=fresh, size=size))
    if not build_only:
        run_ui(s, port=port, address="127.0.0.1", open_browser=not no_browser)


def register_all() -> None:
    from shopdb.cli import lab, measure, polish, records, release, spc

    for module in (measure, records, release, spc, lab, polish):
        module.register(app)


register_all()


def main() -> None:
    try:
        # with standalone_mode=False, click returns the code of a typer.Exit instead of raising it
        rc = app(standalone_mode=False)
        sys.exit(rc if isinstance(rc, int) else 0)
    except ShopdbError as exc:
        typer.echo(f"shopdb: error: {' '.join(str(exc).split())}", err=True)
        sys.exit(2)
    except typer.Exit as exc:
        sys.exit(exc.exit_code)
    except typer.Abort:
        typer.echo("shopdb: aborted", err=True)
        sys.exit(130)
    except KeyboardInterrupt:
        typer.echo("shopdb: interrupted", err=True)
        sys.exit(130)
    except Exception as exc:
        # usage errors (unknown command, bad option value) from typer's click layer
        if hasattr(exc, "show") and hasattr(exc, "exit_code"):
            exc.show()
            sys.exit(2)
        raise
