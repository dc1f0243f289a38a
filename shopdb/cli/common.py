"""What the command modules share: options, opening the shop, the acting user, output.

Nothing heavy is imported at module level: ``shopdb --version`` and ``--help`` load only typer.
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import math
import os
import sys
from collections.abc import Callable, Iterator, Sequence
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer

from shopdb.errors import ShopdbError

if TYPE_CHECKING:
    from shopdb.config import Settings
    from shopdb.services.session import Shop

HomeOpt = Annotated[
    Path | None,
    typer.Option(
        "--home", help="shopdb home folder (default: $SHOPDB_HOME or ~/.local/share/shopdb)."
    ),
]
AsOpt = Annotated[
    str | None,
    typer.Option(
        "--as",
        help="Acting user (default $SHOPDB_USER); password from $SHOPDB_PASSWORD, "
        "$SHOPDB_PASSWORD_FILE or a prompt.",
    ),
]
JsonOpt = Annotated[bool, typer.Option("--json", help="Print JSON (stable keys, see README).")]


def settings(home: Path | None) -> Settings:
    from shopdb.config import load_settings

    return load_settings(home)


@contextlib.contextmanager
def opened(home: Path | None) -> Iterator[Shop]:
    """The shop, its engine disposed afterwards."""
    from shopdb.services.session import open_shop

    shop = open_shop(settings(home))
    try:
        yield shop
    finally:
        shop.engine.dispose()


def read(home: Path | None, fn: Callable[[Shop, Any], Any]) -> Any:
    """``fn(shop, session)`` in a read-only session: viewing needs no password."""
    with opened(home) as shop, shop.read() as session:
        return fn(shop, session)


def password_for(username: str, *, prompt: str | None = None) -> str:
    """The acting user's password: $SHOPDB_PASSWORD, the file $SHOPDB_PASSWORD_FILE names (a
    station's service account: not visible in the process environment of a running watcher
    when given as a file), or a prompt."""
    password = os.environ.get("SHOPDB_PASSWORD")
    if password is not None:
        return password
    file = os.environ.get("SHOPDB_PASSWORD_FILE")
    if file:
        try:
            return Path(file).read_text(encoding="utf-8").rstrip("\r\n")
        except (OSError, UnicodeDecodeError) as exc:
            raise ShopdbError(f"SHOPDB_PASSWORD_FILE {file}: cannot be read ({exc})") from None
    if not sys.stdin.isatty():
        raise ShopdbError(
            f"no password for {username}: set SHOPDB_PASSWORD or SHOPDB_PASSWORD_FILE, "
            "or run interactively"
        )
    return typer.prompt(prompt or f"password for {username}", hide_input=True)


def actor(shop: Shop, username: str | None):
    """Authenticate the acting user (a failed attempt is counted in its own transaction)."""
    from shopdb.services.session import authenticate_user

    username = username or os.environ.get("SHOPDB_USER")
    if not username:
        raise ShopdbError("no acting user: give --as USER or set SHOPDB_USER")
    return authenticate_user(shop, username, password_for(username), client="cli")


def as_actor(home: Path | None, as_user: str | None, fn: Callable[[Shop, Any, Any], Any]) -> Any:
    """Run ``fn(shop, session, actor)`` in one transaction as the authenticated acting user."""
    with opened(home) as shop:
        user = actor(shop, as_user)
        with shop.write() as session:
            return fn(shop, session, user)


def parse_time(text: str | None, what: str) -> datetime | None:
    from datetime import UTC

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


def meta(pixel_mm, units, wavelength_nm, kind):
    from shopdb.formats import Metadata

    return Metadata(dx_mm=pixel_mm, units=units, wavelength_nm=wavelength_nm, kind=kind)


def plain(obj: Any) -> Any:
    """JSON-able: DataFrames as lists of records, timestamps as ISO strings, NaN/inf as null."""
    import numpy as np
    import pandas as pd

    if isinstance(obj, pd.DataFrame):
        return [plain(r) for r in obj.to_dict(orient="records")]
    if isinstance(obj, dict):
        return {(k if isinstance(k, str) else str(k)): plain(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [plain(v) for v in obj]
    if isinstance(obj, datetime | pd.Timestamp):
        return obj.isoformat()
    if isinstance(obj, np.ndarray):
        return plain(obj.tolist())
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if hasattr(obj, "as_dict"):
        return plain(obj.as_dict())
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return plain(dataclasses.asdict(obj))
    if obj is pd.NaT:
        return None
    return obj


def emit_json(obj: Any) -> None:
    typer.echo(json.dumps(plain(obj)))


def table(rows: Sequence[Sequence[Any]], headers: Sequence[str]) -> str:
    """An aligned text table: numbers right-aligned, text left-aligned, blanks for missing."""
    cells = [[_cell(v) for v in r] for r in rows]
    numeric = [
        all(_is_number(r[i]) or r[i] in (None, "") for r in rows) if rows else False
        for i in range(len(headers))
    ]
    widths = [max([len(h)] + [len(c[i]) for c in cells]) for i, h in enumerate(headers)]

    def line(values: Sequence[str]) -> str:
        parts = [
            v.rjust(w) if num else v.ljust(w)
            for v, w, num in zip(values, widths, numeric, strict=True)
        ]
        return "  ".join(parts).rstrip()

    out = [line(headers), line(["-" * w for w in widths])]
    out += [line(c) for c in cells]
    return "\n".join(out)


def _is_number(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool)


def _cell(v: Any) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return ""
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return f"{v:.3g}" if abs(v) < 0.01 and v else f"{v:.2f}" if abs(v) < 1000 else f"{v:.0f}"
    return str(v)


ZONE_WORDS = {
    "conformance proven": "proven in",
    "non-conformance proven": "proven out",
    "inside the uncertainty range": "uncertain",
}


def field_text(f: dict) -> str:
    """One judged field in a line: ``irregularity 30.1 ± 2.5 / 31.6 nm uncertain (88 % in)``."""
    if f.get("measured") is None:
        return f"{f['label']} - / {f['limit']:.1f} {f['unit']}"
    u = f" ± {f['U']:.1f}" if f.get("U") is not None else ""
    zone = f" {ZONE_WORDS.get(f.get('zone'), '')}" if f.get("zone") else ""
    risk = ""
    if (
        f.get("zone") == "inside the uncertainty range"
        and f.get("conformance_probability") is not None
    ):
        risk = f" ({f['conformance_probability']:.0%} likely in)"
    mark = "" if f["passed"] else " FAIL"
    return (
        f"{f['label']} {abs(f['measured']):.1f}{u} / {f['limit']:.1f} {f['unit']}{zone}{risk}{mark}"
    )


def when(t: Any, tz: str = "UTC") -> str:
    """A time to the minute in the shop's time zone (``SHOPDB_TIMEZONE``), zone named."""
    if t is None:
        return ""
    from shopdb.config import local_time

    return local_time(t, tz)
