"""Control-chart signals as a lead works them: consecutive signals grouped into episodes
(:func:`shopdb.spc.charts.episodes`), each open until someone records its assignable cause and
the action taken (an audited, write-once :class:`shopdb.models.SignalResponse`).

The floor watches the mid-spatial band and the RMS of every drawing, one chart per machine
(``WATCHED``); its "need attention" count is the open episodes of those charts in the last 60
days, and the control-chart page opens on the watched chart with the most of them.
"""

from __future__ import annotations

from datetime import datetime, timedelta

import pandas as pd
from sqlmodel import Session, col, select

from shopdb import models as m
from shopdb.errors import ShopdbError
from shopdb.services.lookups import CHECK_DRAWING
from shopdb.services.masterdata import create_audited
from shopdb.services.reads.charts import control_chart, quantity_of
from shopdb.services.users import require
from shopdb.spc import charts

WATCHED = ("band:3", "rms_nm")
RECENT_DAYS = 60
EPISODE_COLUMNS = [
    "group",
    "first_measurement_id",
    "last_measurement_id",
    "first",
    "last",
    "points",
    "signals",
    "rules",
    "what",
    "kind",
    "status",
    "cause",
    "action",
    "recorded_by",
    "recorded_at",
]


def _responses(session: Session, metric: str, drawing: str | None, grouping: str) -> dict:
    rows = session.exec(
        select(m.SignalResponse, m.User.display_name)
        .join(m.User, col(m.User.id) == m.SignalResponse.recorded_by_id)
        .where(
            m.SignalResponse.metric == metric,
            m.SignalResponse.grouping == grouping,
            col(m.SignalResponse.drawing) == drawing
            if drawing is not None
            else col(m.SignalResponse.drawing).is_(None),
        )
        .order_by(col(m.SignalResponse.id))
    ).all()
    return {(r.group_name, r.first_measurement_id): (r, name) for r, name in rows}  # newest wins


def episodes_of(
    session: Session, table: pd.DataFrame, *, metric: str, drawing: str | None, by: str | None
) -> pd.DataFrame:
    """The episodes of a control-chart table (one row each), open or handled."""
    if table.empty:
        return pd.DataFrame(columns=EPISODE_COLUMNS)
    grouping = by or "all"
    done = _responses(session, metric, drawing, grouping)
    rows = []
    for group, g in table.groupby("group", sort=False):
        g = g.reset_index(drop=True)
        for i0, i1 in charts.episodes(g["rules"].tolist()):
            part = g.iloc[i0 : i1 + 1]
            fired = part[part["rules"].map(len) > 0]
            first_id = int(part["measurement_id"].iloc[0])
            response = done.get((str(group), first_id))
            kinds = set(fired["signal"]) - {""}
            rows.append(
                {
                    "group": group,
                    "first_measurement_id": first_id,
                    "last_measurement_id": int(part["measurement_id"].iloc[-1]),
                    "first": part["measured_at"].iloc[0],
                    "last": part["measured_at"].iloc[-1],
                    "points": len(part),
                    "signals": len(fired),
                    "rules": ", ".join(sorted({c for r in fired["rules"] for c in r})),
                    "what": fired["explanation"].iloc[-1],
                    "kind": "deterioration"
                    if "deterioration" in kinds
                    else ", ".join(kinds) or "pattern",
                    "status": "handled" if response else "open",
                    "cause": response[0].cause if response else None,
                    "action": response[0].action if response else None,
                    "recorded_by": response[1] if response else None,
                    "recorded_at": response[0].recorded_at if response else None,
                }
            )
    return pd.DataFrame(rows, columns=EPISODE_COLUMNS)


def chart_and_episodes(
    *,
    session: Session,
    metric: str,
    drawing: str | None,
    by: str | None,
    chart: str = "imr",
    phase_by: str | None = None,
    rule_set: str = "nelson",
    baseline: int | None = 20,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The per-point chart table and its episodes."""
    t = control_chart(
        session=session,
        metric=metric,
        drawing=drawing,
        by=by,
        chart=chart,
        phase_by=phase_by,
        rule_set=rule_set,
        baseline=baseline,
    )
    return t, episodes_of(session, t, metric=metric, drawing=drawing, by=by)


def has_phases(table: pd.DataFrame, key: str = "pad") -> bool:
    """Whether the run parameter ``key`` changes within some group of a chart table."""
    if table.empty or "run_params" not in table:
        return False
    values = table.assign(
        v=[(p or {}).get(key) if isinstance(p, dict) else None for p in table["run_params"]]
    )
    return bool(values.groupby("group")["v"].nunique().max() > 1)


def watched(
    *, session: Session, since: datetime | None = None
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Every watched chart (drawing x watched metric, one chart per machine) with its open
    episodes whose last point is recent and their signals, most signals first; and those open
    episodes."""
    drawings = session.exec(
        select(m.Drawing.number).where(m.Drawing.number != CHECK_DRAWING).distinct()
    ).all()
    if since is None:
        last = session.exec(
            select(m.Measurement.measured_at).order_by(col(m.Measurement.measured_at).desc())
        ).first()
        since = (last or m.utcnow()) - timedelta(days=RECENT_DAYS)
    rows, found = [], []
    for drawing in sorted(drawings):
        for metric in WATCHED:
            t, eps = chart_and_episodes(
                session=session, metric=metric, drawing=drawing, by="machine", phase_by="pad"
            )
            label = quantity_of(metric).label
            recent = eps[
                (eps["status"] == "open") & (pd.to_datetime(eps["last"], utc=True) >= since)
            ]
            if not recent.empty:
                found.append(recent.assign(drawing=drawing, metric=metric, label=label))
            rows.append(
                {
                    "drawing": drawing,
                    "metric": metric,
                    "label": label,
                    "open": len(recent),
                    "signals": int(recent["signals"].sum()),
                    "groups": ", ".join(sorted(set(recent["group"]))),
                    "phases": has_phases(t),
                }
            )
    summary = pd.DataFrame(
        rows, columns=["drawing", "metric", "label", "open", "signals", "groups", "phases"]
    )
    summary = summary.sort_values(
        ["signals", "open"], ascending=False, kind="stable", ignore_index=True
    )
    return summary, (pd.concat(found, ignore_index=True) if found else pd.DataFrame())


def record_response(
    *,
    session: Session,
    actor: m.User,
    metric: str,
    drawing: str | None,
    by: str | None,
    group: str,
    first_measurement_id: int,
    last_measurement_id: int,
    cause: str,
    action: str,
) -> m.SignalResponse:
    """Record the assignable cause of an episode and the action taken (lead, metrology, admin)."""
    require(actor, "respond_to_signals")
    cause, action = cause.strip(), action.strip()
    if not cause or not action:
        raise ShopdbError("a response needs both the assignable cause found and the action taken")
    quantity_of(metric)
    for mid in (first_measurement_id, last_measurement_id):
        if session.get(m.Measurement, mid) is None:
            raise ShopdbError(f"no measurement {mid}")
    return create_audited(
        session,
        actor,
        m.SignalResponse(
            metric=metric,
            drawing=drawing,
            grouping=by or "all",
            group_name=group,
            first_measurement_id=first_measurement_id,
            last_measurement_id=last_measurement_id,
            cause=cause,
            action=action,
            recorded_by_id=actor.id,
        ),
        action="respond_to_signals",
    )
