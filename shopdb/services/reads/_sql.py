"""What the bulk reads share: the newest-result join, raw timestamps, and fast frames."""

from __future__ import annotations

import gc
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlalchemy.orm import aliased
from sqlmodel import Session

from shopdb import models as m


def is_newest(session: Session, result, measurement):
    """Join condition: ``result`` is the newest result of ``measurement``.

    Each database gets the form it plans best on the (measurement_id, id) index: PostgreSQL an
    anti-join (no newer result exists; a hash anti-join), SQLite one ``max(id)`` index probe per
    row. Both mean the same rows."""
    s2 = aliased(m.SurfaceResult)
    same = result.measurement_id == measurement.id
    if session.get_bind().dialect.name == "postgresql":
        newer = sa.exists().where(s2.measurement_id == result.measurement_id, s2.id > result.id)
        return sa.and_(same, ~newer)
    newest = sa.select(sa.func.max(s2.id)).where(s2.measurement_id == measurement.id)
    return sa.and_(same, result.id == newest.scalar_subquery())


def raw_time(session: Session, column):
    """A timestamp column as the cheapest raw value to read in bulk: SQLite's stored ISO text,
    PostgreSQL's epoch seconds as a double (psycopg's datetime objects cost more to make and to
    convert than the query itself). :func:`utc` turns either into UTC timestamps."""
    if session.get_bind().dialect.name == "postgresql":
        return sa.cast(sa.extract("epoch", column), sa.Float)
    return sa.type_coerce(column, sa.String)


def utc(values: pd.Series) -> pd.Series:
    """UTC timestamps from :func:`raw_time` values, in one vectorised pass."""
    if len(values) and isinstance(values.iloc[0], str):
        return pd.to_datetime(values, utc=True, format="ISO8601")
    if len(values) and isinstance(values.iloc[0], float | np.floating):
        return pd.to_datetime(values, unit="s", utc=True).dt.round("us")
    return pd.to_datetime(values, utc=True)


def frame(session: Session, stmt, columns: list[str], index: str | None = None) -> pd.DataFrame:
    """A large read as a DataFrame, from the driver's own tuples (no per-row SQLAlchemy processing).

    The cyclic garbage collector is paused until the tuples are gone: 100,000 rows are half a
    million new objects, none of them in a reference cycle, and every collection their allocation
    triggers scans the whole process (in the app's process 100-250 ms of one KPI query)."""
    paused = gc.isenabled()
    rows: Sequence[Any] = []
    gc.disable()
    try:
        result = session.connection().execute(stmt)
        try:
            rows = result.cursor.fetchall()
        finally:
            result.close()
        return pd.DataFrame.from_records(rows, columns=columns, index=index)
    finally:
        del rows
        if paused:
            gc.enable()
