"""What the app and the CLI need to open the shop: engine, blob store, signed-in user.

The UI imports only ``shopdb.services``; this module hands it plain values (dicts, DataFrames),
never ORM objects or SQLAlchemy.
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass

from sqlalchemy.engine import Engine

from shopdb.blobs import BlobStore
from shopdb.config import Settings, load_settings
from shopdb.db import open_database, read_session, write_session
from shopdb.errors import NotFound, PermissionDenied, ShopdbError
from shopdb.services import users


@dataclass(frozen=True)
class Shop:
    """An opened shop: the engine and blob store every service call uses."""

    settings: Settings
    engine: Engine
    blobs: BlobStore

    @contextlib.contextmanager
    def read(self):
        with read_session(self.engine) as session:
            session.info["seal_key_file"] = self.settings.seal_key_path
            yield session

    @contextlib.contextmanager
    def write(self):
        with write_session(self.engine) as session:
            session.info["seal_key_file"] = self.settings.seal_key_path
            yield session


def open_shop(settings: Settings | None = None) -> Shop:
    settings = settings or load_settings()
    return Shop(settings, open_database(settings), BlobStore(settings.blob_dir))


@dataclass(frozen=True)
class SignedIn:
    username: str
    display_name: str
    role: str
    via: str = "password"  # "proxy": signed in by the trusted header, so no password was typed


def authenticate_user(
    shop: Shop, username: str, password: str, *, client: str = "cli", wrong: str = users.WRONG
):
    """The active user with this password (argon2id), or PermissionDenied (``wrong`` its
    message). A failure is counted and audited in a transaction of its own, so it stays counted
    whatever the caller does next."""
    with shop.write() as session:
        try:
            return users.authenticate(
                session=session, username=username, password=password, client=client, wrong=wrong
            )
        except PermissionDenied:
            session.commit()  # keep the failed-attempt count
            raise


def sign_in(shop: Shop, username: str, password: str, *, client: str = "app") -> SignedIn:
    """Check the password; raises PermissionDenied with a message for the user."""
    user = authenticate_user(shop, username, password, client=client)
    return SignedIn(user.username, user.display_name, user.role)


def current_account(shop: Shop, username: str) -> SignedIn | None:
    """The signed-in user as the records now stand: None once the account is disabled or gone,
    with its current role (an app session re-checks this on every page)."""
    with shop.read() as session:
        try:
            user = users.get_user(session=session, username=username)
        except NotFound:
            return None
        if not user.active:
            return None
        return SignedIn(user.username, user.display_name, user.role)


def sign_in_trusted(shop: Shop, username: str) -> SignedIn:
    """Sign in a user a reverse proxy has authenticated (``SHOPDB_TRUSTED_USER_HEADER``)."""
    if not shop.settings.trusted_user_header:
        raise PermissionDenied("sign-in by proxy header is not enabled")
    with shop.read() as session:
        try:
            user = users.get_user(session=session, username=username)
        except NotFound:
            raise PermissionDenied(f"no shopdb user named {username!r}") from None
        users.require(user, "view")  # refuses a disabled account
        return SignedIn(user.username, user.display_name, user.role, via="proxy")


def check_serving(settings: Settings, address: str) -> None:
    """Refuse to serve sign-in by proxy header where any client could send that header: the app
    must then listen on the loopback interface, behind the proxy."""
    import ipaddress

    if not settings.trusted_user_header:
        return
    try:
        loopback = address == "localhost" or ipaddress.ip_address(address).is_loopback
    except ValueError:
        loopback = False
    if not loopback:
        raise ShopdbError(
            "SHOPDB_TRUSTED_USER_HEADER is set: serve the app on 127.0.0.1 behind the proxy "
            f"(--address 127.0.0.1), not on {address}, or anyone reaching the port could "
            "claim any user"
        )


def create_shop(settings: Settings) -> None:
    """Create the home folder (SQLite), the blob folder and a migrated database."""
    from shopdb.db import migrate

    if settings.is_sqlite:
        if settings.home.exists() and not settings.home.is_dir():
            raise ShopdbError(f"shopdb home {settings.home} exists and is not a folder")
        settings.home.mkdir(parents=True, exist_ok=True)
    settings.blob_dir.mkdir(parents=True, exist_ok=True)
    open_database(settings, require_current=False).dispose()
    migrate(settings.database_url)


def schema_revisions(settings: Settings) -> tuple[str | None, str]:
    """(the database's schema revision, the newest this version knows)."""
    from shopdb.db import current_revision, head_revision

    engine = open_database(settings, require_current=False)
    try:
        return current_revision(engine), head_revision()
    finally:
        engine.dispose()


def upgrade_schema(
    settings: Settings, revision: str = "head"
) -> tuple[str | None, str | None, int]:
    """Migrate to ``revision``; at the newest, judge the results stored before their judgement
    was kept. Returns (revision before, revision after, results judged)."""
    from shopdb.db import migrate

    before, _ = schema_revisions(settings)
    migrate(settings.database_url, revision)
    after, head = schema_revisions(settings)
    judged = 0
    if after == head:
        from shopdb.services.health import judge_unjudged
        from shopdb.services.release import seal_verified

        shop = open_shop(settings)
        try:
            judged = judge_unjudged(shop)
            with shop.write() as session:
                seal_verified(session)
            from shopdb.services import removal

            with shop.write() as session:
                removal.backfill(session, shop.blobs)
        finally:
            shop.engine.dispose()
    return before, after, judged


def check_database(settings: Settings) -> None:
    """Reach the database and check its schema is current (a one-line error otherwise)."""
    open_database(settings).dispose()
