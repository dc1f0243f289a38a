"""Engines, sessions and migrations.

SQLite (the embedded default) is opened in WAL mode with foreign keys on, a busy timeout and
full sync. Write transactions start with ``BEGIN IMMEDIATE`` so two writers never deadlock on
a read-to-write lock upgrade; read-only sessions use a plain deferred ``BEGIN``.
PostgreSQL (``postgresql+psycopg://``) gets pre-ping so a restarted server is survived.
"""

from __future__ import annotations

import contextlib
import functools
import importlib
import re
from collections.abc import Iterator
from pathlib import Path

import sqlalchemy as sa
from sqlalchemy import event
from sqlalchemy.engine import Engine, make_url
from sqlalchemy.exc import ArgumentError, OperationalError
from sqlmodel import Session

from shopdb.config import Settings
from shopdb.errors import ShopdbError

SQLITE_BUSY_TIMEOUT_MS = 30_000


def _sqlite_pragmas(dbapi_connection, _record) -> None:
    # Hand transaction control to SQLAlchemy (pysqlite's own BEGIN is deferred).
    dbapi_connection.isolation_level = None
    cur = dbapi_connection.cursor()
    cur.execute(f"PRAGMA busy_timeout = {SQLITE_BUSY_TIMEOUT_MS}")
    cur.execute("PRAGMA journal_mode = WAL")
    cur.execute("PRAGMA foreign_keys = ON")
    cur.execute("PRAGMA synchronous = FULL")
    cur.close()


def _sqlite_begin(conn) -> None:
    mode = conn.get_execution_options().get("sqlite_begin", "IMMEDIATE")
    conn.exec_driver_sql(f"BEGIN {mode}")


def _text_problem(value) -> str | None:
    """Why a value cannot be stored as text on both databases (PostgreSQL refuses NUL in text
    and in JSON strings; SQLite would keep it)."""
    if isinstance(value, str):
        return "contains a NUL character" if "\x00" in value else None
    if isinstance(value, dict):
        value = [*value.keys(), *value.values()]
    if isinstance(value, list | tuple):
        return next((p for p in map(_text_problem, value) if p), None)
    return None


@event.listens_for(Session, "before_flush")
def _check_text(session, _context, _instances) -> None:
    """Every text value written, checked the same on both databases before it reaches them:
    no NUL character, no longer than its column (SQLite would silently store 5000 characters
    in a 64-character column; PostgreSQL would fail with a DataError)."""
    for row in (*session.new, *session.dirty):
        table = getattr(row, "__table__", None)
        if table is None:
            continue
        for column in table.columns:
            value = getattr(row, column.key, None)
            if value is None:
                continue
            name = f"{table.name.replace('_', ' ')} {column.key.replace('_', ' ')}"
            problem = _text_problem(value)
            if problem:
                raise ShopdbError(f"{name}: {problem}")
            length = getattr(column.type, "length", None)
            if isinstance(value, str) and length is not None and len(value) > length:
                raise ShopdbError(f"{name}: {len(value)} characters, at most {length} are kept")


_TABLE = re.compile(r"\b(?:FROM|INTO|UPDATE)\s+\"?(\w+)", re.I)


def _no_nul_parameters(_conn, _cursor, statement, parameters, context, _many) -> None:
    """Last line for values that only look things up (a serial typed with a NUL): the same
    one-line refusal on both databases, naming the table and column, instead of PostgreSQL's
    DataError."""
    for row in parameters if isinstance(parameters, list) else [parameters]:
        if isinstance(row, dict):
            named = list(row.items())
        else:
            names = getattr(getattr(context, "compiled", None), "positiontup", None) or []
            named = list(zip([*names, *[""] * len(row or ())], row or (), strict=False))
        for name, value in named:
            if isinstance(value, str) and "\x00" in value:
                table = _TABLE.search(statement)
                column = re.sub(r"_\d+$", "", name).replace("_", " ")
                what = " ".join(
                    x for x in (table and table.group(1).replace("_", " "), column) if x
                )
                raise ShopdbError(f"{what or 'a value'}: contains a NUL character")


def make_engine(url: str) -> Engine:
    """Engine for ``url``; raises :class:`ShopdbError` for a malformed or unsupported URL."""
    try:
        parsed = make_url(url)
    except ArgumentError:
        raise ShopdbError(f"database URL {url!r} is not a valid SQLAlchemy URL") from None
    backend = parsed.get_backend_name()
    if backend == "sqlite":
        db_path = parsed.database
        if db_path and db_path != ":memory:" and not Path(db_path).parent.is_dir():
            raise ShopdbError(f"database folder {Path(db_path).parent} does not exist")
        engine = sa.create_engine(parsed, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_MS / 1000})
        event.listen(engine, "connect", _sqlite_pragmas)
        event.listen(engine, "begin", _sqlite_begin)
        event.listen(engine, "before_cursor_execute", _no_nul_parameters)
        return engine
    if backend == "postgresql":
        if parsed.get_driver_name() != "psycopg":
            raise ShopdbError(
                f"database URL {url!r}: use the psycopg driver (postgresql+psycopg://...)"
            )
        engine = sa.create_engine(parsed, pool_pre_ping=True)
        event.listen(engine, "before_cursor_execute", _no_nul_parameters)
        return engine
    raise ShopdbError(f"database URL {url!r}: only sqlite and postgresql are supported")


def _reader(engine: Engine) -> Engine:
    """``engine`` for reading: on SQLite a deferred ``BEGIN``, which takes no write lock (under
    WAL a reader never waits for a writer, however long its transaction)."""
    if engine.dialect.name == "sqlite":
        return engine.execution_options(sqlite_begin="DEFERRED")
    return engine


def probe(engine: Engine) -> None:
    """Connect once; an unreachable database becomes a one-line :class:`ShopdbError`."""
    try:
        with _reader(engine).connect() as conn:
            conn.exec_driver_sql("SELECT 1")
    except OperationalError as exc:
        reason = str(exc.orig).strip().splitlines()[0] if exc.orig else str(exc)
        raise ShopdbError(f"cannot reach database {engine.url!r}: {reason}") from None


@contextlib.contextmanager
def write_session(engine: Engine) -> Iterator[Session]:
    """One use-case, one transaction: commits on success, rolls back on any error."""
    with Session(engine, expire_on_commit=False) as session, session.begin():
        yield session


@contextlib.contextmanager
def read_session(engine: Engine) -> Iterator[Session]:
    """A read-only session (deferred transaction on SQLite, so readers never queue)."""
    with Session(
        _reader(engine)
    ) as session:  # close() ends the transaction; loaded objects stay readable
        yield session


def migrations_dir() -> Path:
    return Path(importlib.import_module("shopdb.migrations").__file__).parent


def alembic_config(url: str):
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(migrations_dir()))
    cfg.set_main_option("sqlalchemy.url", url.replace("%", "%%"))
    return cfg


def migrate(url: str, revision: str = "head") -> None:
    """Bring the schema at ``url`` to ``revision`` (the only way the schema is created)."""
    from alembic import command

    command.upgrade(alembic_config(url), revision)


def current_revision(engine: Engine) -> str | None:
    """The schema revision alembic recorded in the database (None before the first migration);
    read with one query, so opening a shop does not load alembic."""
    with _reader(engine).connect() as conn:
        if not sa.inspect(conn).has_table("alembic_version"):
            return None
        return conn.execute(sa.text("SELECT version_num FROM alembic_version")).scalar()


_REVISION = re.compile(r"^(down_revision|revision)\b[^=\n]*=\s*['\"]?([^'\"\s]+)['\"]?", re.M)


@functools.cache
def head_revision() -> str:
    """The newest migration's revision: the one no other migration revises (read from the
    migration files' ``revision`` and ``down_revision`` lines; a test holds it to alembic's)."""
    revisions, parents = set(), set()
    for path in (migrations_dir() / "versions").glob("[0-9]*.py"):
        found = dict((k, v) for k, v in _REVISION.findall(path.read_text(encoding="utf-8")))
        revisions.add(found["revision"])
        if found.get("down_revision") not in (None, "None"):
            parents.add(found["down_revision"])
    heads = revisions - parents
    if len(heads) != 1:
        raise ShopdbError(f"the migrations have {len(heads)} heads: {sorted(heads)}")
    return heads.pop()


def open_database(settings: Settings, *, require_current: bool = True) -> Engine:
    """Engine for the configured database, checked reachable and (optionally) migrated."""
    if settings.is_sqlite and not settings.home.is_dir():
        raise ShopdbError(f"shopdb home {settings.home} does not exist; run 'shopdb init' first")
    engine = make_engine(settings.database_url)
    probe(engine)
    if require_current:
        rev = current_revision(engine)
        if rev != head_revision():
            engine.dispose()
            raise ShopdbError(
                f"database schema is at revision {rev or 'none'}, not {head_revision()}; "
                "run 'shopdb db upgrade'"
            )
    return engine
