"""Engine factory, migrations, concurrency."""

from __future__ import annotations

import multiprocessing as mp
import re

import pytest
import sqlalchemy as sa
from alembic import command
from alembic.script import ScriptDirectory
from sqlmodel import select

from shopdb.db import (
    alembic_config,
    current_revision,
    head_revision,
    make_engine,
    migrate,
    write_session,
)
from shopdb.errors import ShopdbError
from shopdb.models import Drawing, Machine


def test_sqlite_pragmas(tmp_path):
    engine = make_engine(f"sqlite:///{tmp_path / 'a.db'}")
    with engine.connect() as conn:
        pragma = lambda p: conn.exec_driver_sql(f"PRAGMA {p}").scalar()  # noqa: E731
        assert pragma("journal_mode") == "wal"
        assert pragma("foreign_keys") == 1
        assert pragma("busy_timeout") == 30000
        assert pragma("synchronous") == 2  # FULL
    engine.dispose()


def test_sqlite_write_transactions_begin_immediate(tmp_path):
    """A write session holds the RESERVED lock from BEGIN on, so a second writer cannot
    start a transaction it would later fail to upgrade (common practice for SQLite in WAL)."""
    url = f"sqlite:///{tmp_path / 'a.db'}"
    migrate(url)
    engine = make_engine(url)
    import sqlite3

    with write_session(engine) as session:
        session.exec(select(Machine)).all()  # a read only, yet the write lock is held
        other = sqlite3.connect(tmp_path / "a.db", timeout=0.1, isolation_level=None)
        with pytest.raises(sqlite3.OperationalError, match="locked"):
            other.execute("BEGIN IMMEDIATE")
        other.close()
    engine.dispose()


def test_opening_and_reading_take_no_write_lock(tmp_path, monkeypatch):
    """While another process holds SQLite's write lock (a long ingest, a reanalyze batch),
    opening the shop and reading it go on: under WAL a deferred transaction never waits for a
    writer (SQLite's WAL documentation, https://sqlite.org/wal.html, "readers do not block
    writers and a writer does not block readers")."""
    import sqlite3

    import shopdb.db as db
    from shopdb.config import Settings

    url = f"sqlite:///{tmp_path / 'shopdb.sqlite3'}"
    migrate(url)
    monkeypatch.setattr(db, "SQLITE_BUSY_TIMEOUT_MS", 200)  # a wait would fail, not hang
    writer = sqlite3.connect(tmp_path / "shopdb.sqlite3", isolation_level=None)
    writer.execute("BEGIN IMMEDIATE")
    writer.execute(
        "INSERT INTO machine (name, kind, notes, created_at) VALUES ('M-held', 'lap', '', '2026-01-01')"
    )
    try:
        engine = db.open_database(
            Settings(home=tmp_path, database_url=url, blob_dir=tmp_path / "blobs")
        )
        with db.read_session(engine) as session:
            assert session.exec(select(Machine)).all() == []  # the uncommitted row unseen
        engine.dispose()
    finally:
        writer.execute("ROLLBACK")
        writer.close()


@pytest.mark.parametrize(
    "url,message",
    [
        ("foo:/bar", "not a valid SQLAlchemy URL"),
        ("mysql+pymysql://x@localhost/db", "only sqlite and postgresql"),
        ("postgresql+psycopg2://x@localhost/db", "use the psycopg driver"),
        ("sqlite:////no/such/folder/x.db", "does not exist"),
    ],
)
def test_bad_urls_are_one_line_errors(url, message):
    with pytest.raises(ShopdbError, match=message):
        make_engine(url)


def test_foreign_keys_are_enforced(shop):
    with pytest.raises(sa.exc.IntegrityError), shop.write() as session:
        from shopdb.models import Part

        session.add(Part(serial="X", drawing_id=999))
        session.flush()


def test_migration_round_trip_and_no_drift(db_url):
    """upgrade head -> alembic check (no drift) -> downgrade base -> upgrade head."""
    cfg = alembic_config(db_url)
    command.check(cfg)  # raises if models and migrations differ
    command.downgrade(cfg, "base")
    engine = make_engine(db_url)
    assert current_revision(engine) is None
    insp = sa.inspect(engine)
    assert [t for t in insp.get_table_names() if t != "alembic_version"] == []
    migrate(db_url)
    assert current_revision(engine) == head_revision()
    engine.dispose()


def test_rows_survive_every_upgrade(db_url):
    """Insert a row at each revision, upgrade step by step to head: all rows are still there."""
    cfg = alembic_config(db_url)
    command.downgrade(cfg, "base")
    script = ScriptDirectory.from_config(cfg)
    revisions = [r.revision for r in reversed(list(script.walk_revisions()))]
    engine = make_engine(db_url)
    for i, rev in enumerate(revisions):
        command.upgrade(cfg, rev)
        with engine.begin() as conn:
            conn.execute(
                sa.text(
                    "INSERT INTO drawing (number, revision, title, surface_form_callout, test_wavelength_nm,"
                    " clear_aperture_mm, min_valid_fraction, created_at)"
                    " VALUES (:n, 'A', '', '3/1(0.5)', 632.8, 90, 0.95, CURRENT_TIMESTAMP)"
                ),
                {"n": f"D-{i}"},
            )
    with write_session(engine) as session:
        assert sorted(d.number for d in session.exec(select(Drawing))) == sorted(
            f"D-{i}" for i in range(len(revisions))
        )
    engine.dispose()


def test_revision_files_use_plain_sqlalchemy_types():
    from shopdb.db import migrations_dir

    for path in (migrations_dir() / "versions").glob("*.py"):
        text = path.read_text()
        assert "sqlmodel" not in text and "shopdb" not in text, path.name


def _insert_worker(url: str, worker: int, count: int) -> None:
    engine = make_engine(url)
    for k in range(count):
        with write_session(engine) as session:
            session.add(Machine(name=f"w{worker}-{k}"))
    engine.dispose()


def test_four_processes_insert_concurrently(db_url):
    """4 processes x 100 one-row transactions: all rows present, no 'database is locked'."""
    ctx = mp.get_context("spawn")
    procs = [ctx.Process(target=_insert_worker, args=(db_url, w, 100)) for w in range(4)]
    for p in procs:
        p.start()
    for p in procs:
        p.join(120)
    assert [p.exitcode for p in procs] == [0, 0, 0, 0]
    engine = make_engine(db_url)
    with engine.connect() as conn:
        assert conn.execute(sa.text("SELECT COUNT(*) FROM machine")).scalar() == 400
    engine.dispose()


def test_the_head_read_from_the_files_is_alembics():
    """Opening a shop reads the head from the migration files (no alembic import); alembic's
    own script directory is the reference."""
    from alembic.script import ScriptDirectory

    assert (
        head_revision()
        == ScriptDirectory.from_config(alembic_config("sqlite://")).get_current_head()
    )


def _drawing(shop, admin, **change):
    from shopdb.services.masterdata import add_drawing

    fields = dict(
        number="D-100",
        revision="A",
        surface_form_callout="3/1(0.5)",
        test_wavelength_nm=632.8,
        clear_aperture_mm=50,
    )
    with shop.write() as session:
        return add_drawing(session=session, actor=admin, **{**fields, **change})


@pytest.mark.parametrize(
    "change,message",
    [
        ({"title": "t" * 5000}, "drawing title: 5000 characters, at most 200 are kept"),
        ({"number": "D-1\x00; DROP"}, "drawing number: contains a NUL character"),
        ({"revision": "ABCDEFGHIJKLMNOPQ"}, "drawing revision: 17 characters, at most 16"),
    ],
)
def test_over_long_text_and_nul_are_refused_the_same_on_both_databases(
    shop, admin, change, message
):
    """SQLite keeps 5000 characters in a 64-character column and a NUL in text; PostgreSQL
    raises DataError for both (PostgreSQL documentation, "Character Types": "The character with
    the code zero cannot be stored"). shopdb refuses both with one line, stores nothing."""
    with pytest.raises(ShopdbError, match=re.escape(message)):
        _drawing(shop, admin, **change)
    with shop.read() as session:
        assert session.exec(select(Drawing)).all() == []


def test_a_nul_in_a_lookup_or_a_sign_in_is_a_plain_answer(shop, admin):
    from shopdb.errors import NotFound, PermissionDenied
    from shopdb.services.lookups import get_by
    from shopdb.services.session import authenticate_user
    from shopdb.services.users import WRONG

    _drawing(shop, admin)
    with shop.read() as session, pytest.raises(NotFound, match="unknown drawing"):
        get_by(session, Drawing, "number", "D-100\x00", "drawing")
    for name in ("admin\x00", "a" * 5000):
        with pytest.raises(PermissionDenied, match=re.escape(WRONG)):
            authenticate_user(shop, name, "whatever-password")
    with shop.read() as session, pytest.raises(ShopdbError, match="NUL character"):
        session.exec(select(Drawing).where(Drawing.title == "x\x00")).all()
