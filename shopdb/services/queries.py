"""Read-only queries behind the app's pages; each returns a pandas DataFrame."""

from __future__ import annotations

import pandas as pd
import sqlalchemy as sa
from sqlmodel import Session

from shopdb import models as m

COUNTED = {
    "drawings": m.Drawing,
    "lots": m.Lot,
    "parts": m.Part,
    "polishing runs": m.PolishingRun,
    "measurements": m.Measurement,
    "results": m.SurfaceResult,
    "machines": m.Machine,
    "stations": m.Station,
    "reference optics": m.ReferenceOptic,
    "reference calibrations": m.ReferenceCalibration,
    "users": m.User,
    "audit events": m.AuditEvent,
}


def record_counts(*, session: Session) -> pd.DataFrame:
    """How many records of each kind the shop holds (one COUNT per table, in SQL)."""
    rows = [
        {
            "records": label,
            "count": session.exec(sa.select(sa.func.count()).select_from(model)).one()[0],
        }
        for label, model in COUNTED.items()
    ]
    return pd.DataFrame(rows)
