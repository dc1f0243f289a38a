"""What the app and the CLI need to open the shop: engine, blob store, signed-in user.

The UI imports only ``shopdb.services``; this module hands it plain values (dicts, DataFrames),
never ORM objects or SQLAlchemy.
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy.engine import Engine

from shopdb.blobs import BlobStore
from shopdb.config import Settings, load_settings
from shopdb.db import open_database, read_session, write_session
from shopdb.errors import NotFound, PermissionDenied
from shopdb.services import users


@dataclass(frozen=True)
class Shop:
    """An opened shop: the engine and blob store every service call uses."""

    settings: Settings
    engine: Engine
    blobs: BlobStore

    def read(self):
        return read_session(self.engine)

    def write(self):
        return write_session(self.engine)


def open_shop(settings: Settings | None = None) -> Shop:
    settings = settings or load_settings()
    return Shop(settings, open_database(settings), BlobStore(settings.blob_dir))


@dataclass(frozen=True)
class SignedIn:
    username: str
    display_name: str
    role: str


def sign_in(shop: Shop, username: str, password: str) -> SignedIn:
    """Check the password (argon2id); raises PermissionDenied with a message for the user."""
    with shop.write() as session:
        try:
            user = users.authenticate(session=session, username=username, password=password)
        except PermissionDenied:
            session.commit()  # keep the failed-attempt count
            raise
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
        return SignedIn(user.username, user.display_name, user.role)
