"""Alembic environment: the schema is created and changed only through these revisions."""

from __future__ import annotations

from alembic import context
from sqlmodel import SQLModel
from sqlmodel.sql.sqltypes import AutoString

import shopdb.models  # noqa: F401  (registers the tables)
from shopdb.db import make_engine
from shopdb.models import UTCDateTime

target_metadata = SQLModel.metadata


def render_item(type_, obj, autogen_context):
    """Render plain SQLAlchemy types in revision files (no sqlmodel or shopdb types)."""
    if type_ == "type":
        if isinstance(obj, UTCDateTime):
            return "sa.DateTime(timezone=True)"
        if isinstance(obj, AutoString):
            return f"sa.String(length={obj.length})" if obj.length else "sa.String()"
    return False


def _configure(**kw) -> None:
    context.configure(
        target_metadata=target_metadata,
        render_item=render_item,
        compare_type=True,
        render_as_batch=True,
        **kw,
    )


def _url() -> str:
    url = context.config.get_main_option("sqlalchemy.url")
    if not url:
        from shopdb.config import load_settings

        url = load_settings().database_url
    return url


def run_migrations_offline() -> None:
    _configure(url=_url(), literal_binds=True)
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    connection = context.config.attributes.get("connection")
    if connection is not None:
        _configure(connection=connection)
        with context.begin_transaction():
            context.run_migrations()
        return
    engine = make_engine(_url())
    try:
        with engine.connect() as conn:
            _configure(connection=conn)
            with context.begin_transaction():
                context.run_migrations()
    finally:
        engine.dispose()


if context.is_offline_mode():
    run_migrations_offline()
else:
    run_migrations_online()
