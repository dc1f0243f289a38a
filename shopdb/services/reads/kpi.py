"""Manager KPIs: each part's outcome at its first final inspection, aggregated by month, week,
drawing or machine, and the Pareto of the callout fields that failed."""

from __future__ import annotations

from datetime import datetime

import pandas as pd
import sqlalchemy as sa
from sqlmodel import Session, col

from shopdb import models as m
from shopdb import quantities
from shopdb.errors import ShopdbError
from shopdb.services.lookups import CHECK_DRAWING
from shopdb.services.reads._sql import frame, is_newest, raw_time, utc
from shopdb.spc import kpi

GROUPS = ("month", "week", "drawing", "machine")


def part_outcomes(
    *,
    session: Session,
    start: datetime | None = None,
    end: datetime | None = None,
    by: str = "month",
) -> pd.DataFrame:
    """Per part that reached a final inspection: the outcome columns of :mod:`shopdb.spc.kpi`.

    A part's first final inspection is its last measurement before its first rework run (a run
    whose parameters say ``"rework": true``), or its last measurement if it had none; first pass =
    that measurement's result passes the drawing as the verdict owner judged its map when the
    result was stored (:mod:`shopdb.services.verdict`: every field, and enough valid pixels) and
    the part was neither reworked nor scrapped. The runs are aggregated in SQL; the per-part reduction is a few grouped passes over
    integer columns (a window function in SQL cost more than the whole reduction does here).
    """
    if by not in GROUPS:
        raise ShopdbError(f"--by {by!r}: {', '.join(GROUPS)}")
    sr, me, pa, ru, co = m.SurfaceResult, m.Measurement, m.Part, m.PolishingRun, m.CalloutOutcome
    check_ids = sa.select(col(m.Drawing.id)).where(col(m.Drawing.number) == CHECK_DRAWING)
    stmt = (
        sa.select(
            col(me.part_id),
            col(ru.iteration),
            col(ru.machine_id),
            raw_time(session, me.measured_at),
            col(co.passes),
            col(co.failed_fields),
            col(co.conditional),
        )
        .select_from(me)
        .join(sr, is_newest(session, sr, me))
        .join(co, col(co.result_id) == sr.id)
        .join(pa, col(pa.id) == me.part_id)
        .outerjoin(ru, col(ru.id) == me.run_id)
        .where(
            col(me.status) == "valid",
            col(pa.status) != "in_process",
            col(pa.drawing_id).not_in(check_ids),
        )
    )
    if start is not None:
        stmt = stmt.where(col(me.measured_at) >= start)
    if end is not None:
        stmt = stmt.where(col(me.measured_at) < end)
    df = frame(
        session,
        stmt.order_by(col(me.measured_at), col(me.id)),
        ["part_id", "iteration", "machine_id", "t", "passes", "failed", "conditional"],
    )
    if df.empty:
        return pd.DataFrame(columns=list(kpi.COLUMNS))
    df["iteration"] = df["iteration"].astype(float)  # NaN: a measurement outside any run
    df["passes"] = df["passes"].astype(bool)
    # runs, aggregated in SQL: each part's first start, first rework iteration and rework count
    rework = ru.params["rework"].as_boolean().is_(True)
    runs = frame(
        session,
        sa.select(
            col(ru.part_id),
            raw_time(session, sa.func.min(ru.started_at)),
            sa.func.min(sa.case((rework, ru.iteration))),
            sa.func.count(sa.case((rework, 1))),
        ).group_by(col(ru.part_id)),
        ["part_id", "started_at", "first_rework", "reworks"],
        index="part_id",
    )
    limit = df["part_id"].map(runs["first_rework"].astype(float))
    eligible = limit.isna() | (df["iteration"] < limit)  # no run (NaN): not before a rework
    final = df[eligible].groupby("part_id").tail(1).set_index("part_id")  # rows are time-ordered
    seen = df.groupby("part_id")["t"]
    first_seen, last_seen = seen.first().reindex(final.index), seen.last().reindex(final.index)
    iterations = df[df["passes"]].groupby("part_id")["iteration"].min().reindex(final.index)
    parts = frame(
        session,
        sa.select(col(pa.id), col(pa.serial), col(pa.status), col(pa.drawing_id)),
        ["part_id", "serial", "status", "drawing_id"],
        index="part_id",
    ).reindex(final.index)
    when = utc(final["t"])
    if by in ("drawing", "machine"):
        label = m.Drawing.number if by == "drawing" else m.Machine.name
        model = m.Drawing if by == "drawing" else m.Machine
        names_of = dict(session.execute(sa.select(col(model.id), col(label))).all())
        group = final["machine_id"] if by == "machine" else parts["drawing_id"]
        group = group.map(names_of).fillna("(none)")
    else:
        group = when.dt.strftime("%Y-%m" if by == "month" else "%G-W%V")
    reworks = runs["reworks"].reindex(final.index).fillna(0).astype(int).to_numpy()
    scrapped = (parts["status"] == "scrapped").to_numpy()
    start_t = utc(runs["started_at"].reindex(final.index).fillna(first_seen))
    out = pd.DataFrame(
        {
            "part": parts["serial"].to_numpy(),
            "group": group.to_numpy(),
            "first_pass": final["passes"].to_numpy() & (reworks == 0) & ~scrapped,
            "reworks": reworks,
            "scrapped": scrapped,
            "iterations": iterations.to_numpy(float),
            "cycle_days": ((utc(last_seen) - start_t).dt.total_seconds() / 86400).to_numpy(),
            "failed_fields": [f.split(",") if f else [] for f in final["failed"].tolist()],
            "conditional": final["conditional"].astype(bool).to_numpy(),
        }
    )
    return out.sort_values("part", kind="stable", ignore_index=True)[list(kpi.COLUMNS)]


def kpi_table(
    *,
    session: Session,
    start: datetime | None = None,
    end: datetime | None = None,
    by: str = "month",
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(KPIs per group, Pareto of failed callout fields with their labels from the catalogue)."""
    outcomes = part_outcomes(session=session, start=start, end=end, by=by)
    pareto = kpi.pareto(outcomes)
    pareto.insert(1, "label", [quantities.for_field(r).label for r in pareto["reason"]])
    return kpi.kpis(outcomes), pareto
