"""Shared fixtures: a fresh database per test on SQLite, and on PostgreSQL when reachable.

PostgreSQL: ``SHOPDB_TEST_POSTGRES_URL`` (default ``postgresql+psycopg://postgres@127.0.0.1:5432/postgres``)
is the admin connection; each pytest run creates its own database ``shopdb_test_<random>``,
migrates it once, empties its tables between tests, and drops it at the end.
Set ``SHOPDB_TEST_POSTGRES=require`` (CI does) to fail instead of skipping when it is down.
"""

from __future__ import annotations

import os
import shutil
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
import sqlalchemy as sa

from shopdb.blobs import BlobStore
from shopdb.config import Settings
from shopdb.db import make_engine, migrate
from shopdb.services.session import Shop

collect_ignore = ["bench"]  # benchmarks are run by hand (DEVELOPERS.md)

PG_ADMIN_URL = os.environ.get(
    "SHOPDB_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/postgres"
)


def _pg_reachable() -> str | None:
    try:
        engine = sa.create_engine(PG_ADMIN_URL, connect_args={"connect_timeout": 3})
        with engine.connect() as conn:
            conn.exec_driver_sql("SELECT 1")
        engine.dispose()
        return None
    except Exception as exc:  # any failure means "not reachable"
        return str(exc).splitlines()[0]


@pytest.fixture(autouse=True)
def _fresh_sign_in_throttle():
    """Each test starts with no remembered sign-in failures (the throttle lives in the process)."""
    from shopdb.services import users

    users._THROTTLE.clear()
    yield
    users._THROTTLE.clear()


@pytest.fixture(scope="session")
def sqlite_template(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("template") / "shopdb.sqlite3"
    migrate(f"sqlite:///{path}")
    return path


@pytest.fixture(scope="session")
def pg_database_url() -> Iterator[str]:
    problem = _pg_reachable()
    if problem:
        if os.environ.get("SHOPDB_TEST_POSTGRES") == "require":
            pytest.fail(f"PostgreSQL required but not reachable: {problem}")
        pytest.skip(f"PostgreSQL not reachable: {problem}")
    name = f"shopdb_test_{uuid.uuid4().hex[:12]}"
    admin = sa.create_engine(PG_ADMIN_URL, isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.exec_driver_sql(f'CREATE DATABASE "{name}"')
    url = sa.engine.make_url(PG_ADMIN_URL).set(database=name).render_as_string(hide_password=False)
    try:
        yield url
    finally:
        with admin.connect() as conn:
            conn.exec_driver_sql(
                "SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE datname = %s", (name,)
            )
            conn.exec_driver_sql(f'DROP DATABASE IF EXISTS "{name}"')
        admin.dispose()


@pytest.fixture(scope="session")
def pg_migrated(pg_database_url) -> str:
    migrate(pg_database_url)
    return pg_database_url


def _truncate_all(url: str) -> None:
    from sqlmodel import SQLModel

    engine = make_engine(url)
    names = ", ".join(f'"{t.name}"' for t in SQLModel.metadata.sorted_tables)
    with engine.begin() as conn:
        # the write-once triggers refuse TRUNCATE; a superuser's replica role skips them
        conn.exec_driver_sql("SET LOCAL session_replication_role = replica")
        conn.exec_driver_sql(f"TRUNCATE {names} RESTART IDENTITY CASCADE")
    engine.dispose()


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def backend(request) -> str:
    return request.param


@pytest.fixture
def db_url(backend, tmp_path, request) -> str:
    """URL of a migrated, empty database (fresh per test)."""
    if backend == "sqlite":
        path = tmp_path / "shopdb.sqlite3"
        shutil.copy(request.getfixturevalue("sqlite_template"), path)
        return f"sqlite:///{path}"
    url = request.getfixturevalue("pg_migrated")
    _truncate_all(url)
    return url


@pytest.fixture
def shop(db_url, tmp_path) -> Iterator[Shop]:
    home = tmp_path / "home"
    (home / "blobs").mkdir(parents=True)
    engine = make_engine(db_url)
    yield Shop(
        Settings(home=home, database_url=db_url, blob_dir=home / "blobs"),
        engine,
        BlobStore(home / "blobs"),
    )
    engine.dispose()


@pytest.fixture
def admin(shop):
    from shopdb.services.users import add_user

    with shop.write() as session:
        return add_user(
            session=session,
            actor=None,
            username="admin",
            display_name="Test Admin",
            role="admin",
            password="admin-password-1",
        )


@pytest.fixture(scope="session")
def small_demo(tmp_path_factory) -> Path:
    """Home folder of the reduced demo shop, built once per test run (SQLite)."""
    from shopdb.config import load_settings
    from shopdb.seed_demo.build import build_demo

    home = tmp_path_factory.mktemp("small-demo") / "shop"
    build_demo(load_settings(home), size="small")
    return home


@pytest.fixture
def tamper(shop):
    """Run raw SQL as someone with direct access to the database would: past the write-once
    triggers (SQLite: they are dropped; PostgreSQL: a superuser's replica role skips them)."""

    def run(sql: str, **params) -> None:
        with shop.engine.begin() as conn:
            if shop.engine.dialect.name == "sqlite":
                names = conn.exec_driver_sql(
                    "SELECT name FROM sqlite_master WHERE type = 'trigger'"
                ).scalars()
                for name in list(names):
                    conn.exec_driver_sql(f'DROP TRIGGER "{name}"')
            else:
                conn.exec_driver_sql("SET LOCAL session_replication_role = replica")
            conn.execute(sa.text(sql), params)

    return run
