"""Helpers shared by the command modules: settings, the acting user, option parsing."""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path
from typing import Annotated

import typer

from shopdb.errors import ShopdbError

HomeOpt = Annotated[
    Path | None,
    typer.Option(
        "--home", help="shopdb home folder (default: $SHOPDB_HOME or ~/.local/share/shopdb)."
    ),
]


def _settings(home: Path | None):
    from shopdb.config import load_settings

    return load_settings(home)


def _echo_json(obj) -> None:
    typer.echo(json.dumps(obj, indent=None, sort_keys=False, default=str))


AsOpt = Annotated[
    str | None,
    typer.Option(
        "--as",
        help="Acting user (default $SHOPDB_USER); password from $SHOPDB_PASSWORD or a prompt.",
    ),
]


def _open(home: Path | None):
    from shopdb.services.session import open_shop

    return open_shop(_settings(home))


def _actor(session, username: str | None):
    """Authenticate the acting user: name from --as / $SHOPDB_USER, password from $SHOPDB_PASSWORD or a prompt."""
    from shopdb.services.users import authenticate

    username = username or os.environ.get("SHOPDB_USER")
    if not username:
        raise ShopdbError("no acting user: give --as USER or set SHOPDB_USER")
    password = os.environ.get("SHOPDB_PASSWORD")
    if password is None:
        if not sys.stdin.isatty():
            raise ShopdbError(
                f"no password for {username}: set SHOPDB_PASSWORD or run interactively"
            )
        password = typer.prompt(f"password for {username}", hide_input=True)
    return authenticate(session=session, username=username, password=password)


def _parse_time(text: str | None, what: str):
    from datetime import UTC, datetime

    if text is None:
        return None
    try:
        t = datetime.fromisoformat(text)
    except ValueError:
        raise ShopdbError(
            f"{what} {text!r} is not an ISO 8601 time (e.g. 2026-03-01T14:05:00+00:00)"
        ) from None
    if t.tzinfo is None:
        raise ShopdbError(f"{what} {text!r} has no time zone; add +00:00 or Z")
    return t.astimezone(UTC)


def _meta(pixel_mm, units, wavelength_nm, kind):
    from shopdb.formats import Metadata

    return Metadata(dx_mm=pixel_mm, units=units, wavelength_nm=wavelength_nm, kind=kind)


def _as_actor(home: Path | None, as_user: str | None, fn):
    """Run ``fn(shop, session, actor)`` in one transaction as the authenticated acting user."""
    shop = _open(home)
    try:
        with shop.write() as session:
            return fn(shop, session, _actor(session, as_user))
    finally:
        shop.engine.dispose()
