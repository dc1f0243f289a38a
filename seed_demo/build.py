"""Build the fictional demo shop (Kestrel Ridge Optics, an invented company) in its own folder."""

from __future__ import annotations

import shutil
import time
from pathlib import Path

from shopdb.config import Settings, load_settings
from shopdb.db import migrate, open_database, write_session
from shopdb.errors import ShopdbError
from shopdb.services import users

MARKER = "demo-built.txt"

# Demo accounts, one per role. Demo only: these passwords are printed on purpose.
DEMO_USERS = (
    ("admin", "Ada Quillfeather", "admin", "demo-admin-pass"),
    ("lead", "Tomas Brightwater", "lead", "demo-lead-pass1"),
    ("qa", "Imre Calloway", "qa", "demo-qa-password"),
    ("metrology", "Sela Voss", "metrology", "demo-metro-pass"),
    ("manager", "Oren Halloway", "manager", "demo-manager-pw"),
    ("operator", "Pim Ashdown", "operator", "demo-operator-pw"),
)


def default_demo_home() -> Path:
    return load_settings().home.parent / "shopdb-demo"


def _create_users(settings: Settings) -> None:
    engine = open_database(settings)
    try:
        with write_session(engine) as session:
            admin = None
            for username, name, role, password in DEMO_USERS:
                user = users.add_user(
                    session=session,
                    actor=admin,
                    username=username,
                    display_name=name,
                    role=role,
                    password=password,
                )
                if role == "admin":
                    admin = user
    finally:
        engine.dispose()


def build_demo(settings: Settings, *, fresh: bool = False, size: str = "full") -> str:
    """Build (or reuse) the demo shop at ``settings.home``; returns a summary to print."""
    if size not in ("full", "small"):
        raise ShopdbError(f"demo size {size!r} is not 'full' or 'small'")
    home = settings.home
    marker = home / MARKER
    if fresh and home.exists():
        if not marker.exists() and any(home.iterdir()):
            raise ShopdbError(f"{home} is not a demo folder (no {MARKER}); refusing to delete it")
        shutil.rmtree(home)
    if marker.exists():
        return f"demo shop at {home} (built earlier; --fresh rebuilds it)\n" + _accounts_text()
    if home.exists() and any(home.iterdir()):
        raise ShopdbError(f"{home} exists and is not an empty demo folder; choose another --home")
    t0 = time.perf_counter()
    home.mkdir(parents=True, exist_ok=True)
    settings.blob_dir.mkdir(parents=True, exist_ok=True)
    migrate(settings.database_url)
    _create_users(settings)
    marker.write_text(f"demo shop, size {size}\n")
    return f"demo shop built at {home} in {time.perf_counter() - t0:.1f} s\n" + _accounts_text()


def _accounts_text() -> str:
    lines = ["demo accounts (demo only, never use these passwords for real):"]
    lines += [f"  {u:<10} {p:<18} {r}" for u, _, r, p in DEMO_USERS]
    return "\n".join(lines)
