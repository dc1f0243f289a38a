"""SPC commands: ``shopdb spc chart|capability``, ``shopdb converge``, ``shopdb drift``, ``shopdb kpi``."""

from __future__ import annotations

import json
import math
from datetime import datetime
from typing import Annotated

import numpy as np
import pandas as pd
import typer

from shopdb.cli_common import HomeOpt, _open, _parse_time
from shopdb.errors import ShopdbError

spc_app = typer.Typer(help="Control charts and capability.", no_args_is_help=True)


def _plain(obj):
    """JSON-able: DataFrames as lists of records, timestamps as ISO strings, NaN/inf as null."""
    if isinstance(obj, pd.DataFrame):
        return [_plain(r) for r in obj.to_dict(orient="records")]
    if isinstance(obj, dict):
        return {k: _plain(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_plain(v) for v in obj]
    if isinstance(obj, datetime | pd.Timestamp):
        return obj.isoformat()
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if hasattr(obj, "as_dict"):
        return _plain(obj.as_dict())
    return obj


def _emit(obj) -> None:
    typer.echo(json.dumps(_plain(obj)))


def _read(home, fn):
    shop = _open(home)
    try:
        with shop.read() as s:
            return fn(s)
    finally:
        shop.engine.dispose()


@spc_app.command("chart")
def chart(
    metric: Annotated[
        str, typer.Option(help="rms_nm, irregularity_nm, ..., z:N,M or band:K.")
    ] = "rms_nm",
    drawing: Annotated[str | None, typer.Option(help="Drawing number.")] = None,
    by: Annotated[str | None, typer.Option(help="machine, station or drawing.")] = None,
    chart_type: Annotated[str, typer.Option("--chart", help="imr, ewma or cusum.")] = "imr",
    phase_by: Annotated[
        str | None,
        typer.Option(
            "--phase-by", help="Run parameter whose change starts a new phase (e.g. pad)."
        ),
    ] = None,
    date_from: Annotated[str | None, typer.Option("--from", help="ISO time with zone.")] = None,
    date_to: Annotated[str | None, typer.Option("--to", help="ISO time with zone.")] = None,
    rules: Annotated[str, typer.Option(help="nelson, western-electric or limits.")] = "nelson",
    as_json: Annotated[
        bool, typer.Option("--json", help="Print the per-point table as JSON.")
    ] = False,
    home: HomeOpt = None,
) -> None:
    """Control chart of a metric: per-point table with limits, zones and the rules that fired.

    Example: shopdb spc chart --metric band:2 --drawing KR-100-W --by machine --phase-by pad --json
    """
    from shopdb.services.queries import control_chart

    t = _read(
        home,
        lambda s: control_chart(
            session=s,
            metric=metric,
            drawing=drawing,
            by=by,
            chart=chart_type,
            phase_by=phase_by,
            start=_parse_time(date_from, "--from"),
            end=_parse_time(date_to, "--to"),
            rule_set=rules,
        ),
    )
    if as_json:
        _emit({"metric": metric, "chart": chart_type, "points": t})
        return
    if t.empty:
        typer.echo("no data")
        return
    for g, gt in t.groupby("group"):
        fired = gt[gt["rules"].map(len) > 0]
        typer.echo(
            f"{g}: {len(gt)} points, centre {gt['centre'].iloc[-1]:.3f}, UCL {gt['ucl'].iloc[-1]:.3f}, "
            f"{len(fired)} signals"
        )
        for _, r in fired.tail(5).iterrows():
            typer.echo(
                f"    {pd.Timestamp(r['measured_at']):%Y-%m-%d} {r['part']}: {r['statistic']:.3f} — {r['explanation']}"
            )


@spc_app.command("capability")
def capability_cmd(
    metric: Annotated[str, typer.Option(help="Metric column.")],
    drawing: Annotated[str, typer.Option(help="Drawing number.")],
    usl: Annotated[
        float, typer.Option(help="Upper specification limit (same unit as the metric).")
    ],
    lsl: Annotated[float | None, typer.Option(help="Lower limit (omit for one-sided).")] = None,
    home: HomeOpt = None,
) -> None:
    """Capability of a metric against a specification (final measurements of the drawing's parts).

    Example: shopdb spc capability --metric irregularity_nm --drawing KR-100-W --usl 31.6
    """
    from shopdb.services.queries import metric_frame
    from shopdb.spc.capability import capability

    df = _read(home, lambda s: metric_frame(session=s, metric=metric, drawing=drawing))
    finals = df.sort_values("measured_at").groupby("part").last()
    try:
        c = capability(finals["value"].abs().to_numpy(float), usl=usl, lsl=lsl)
    except ValueError as exc:
        raise ShopdbError(f"capability: {exc}") from None
    _emit(c)


def converge(
    part: Annotated[str, typer.Argument(help="Part serial.")],
    metric: Annotated[
        str | None, typer.Option(help="Metric (default: the drawing's irregularity or RMS field).")
    ] = None,
    home: HomeOpt = None,
) -> None:
    """Run-to-run convergence of a part and the forecast of further runs to its tolerance.

    Example: shopdb converge W-0101 --json
    """
    from shopdb.services.queries import part_convergence

    _emit(_read(home, lambda s: part_convergence(session=s, serial=part, metric=metric)))


def drift_cmd(
    reference: Annotated[str, typer.Argument(help="Reference optic name.")],
    term: Annotated[str, typer.Option(help='Zernike "n,m", or pv or rms.')] = "2,0",
    threshold_nm: Annotated[
        float | None, typer.Option("--threshold-nm", help="Deviation that makes recalibration due.")
    ] = None,
    impact: Annotated[
        bool,
        typer.Option(
            "--impact", help="List measurements whose verdict the predicted drift would change."
        ),
    ] = False,
    home: HomeOpt = None,
) -> None:
    """Drift of a reference optic's calibrations: rate, band, due date, and optionally the impact list.

    Example: shopdb drift TF-2 --term 2,0 --threshold-nm 3 --impact
    """
    from shopdb.services.queries import drift_impact, reference_drift

    def fn(s):
        out = reference_drift(session=s, reference=reference, term=term, threshold_nm=threshold_nm)
        if impact:
            out["impact"] = drift_impact(session=s, reference=reference)
        return out

    _emit(_read(home, fn))


def kpi_cmd(
    date_from: Annotated[str | None, typer.Option("--from", help="ISO time with zone.")] = None,
    date_to: Annotated[str | None, typer.Option("--to", help="ISO time with zone.")] = None,
    by: Annotated[str, typer.Option(help="month, week, drawing or machine.")] = "month",
    home: HomeOpt = None,
) -> None:
    """First-pass yield, rework, scrap, iterations and cycle time, grouped; and the Pareto of failures.

    Example: shopdb kpi --from 2026-01-01T00:00Z --by month
    """
    from shopdb.services.queries import kpi_table

    table, pareto = _read(
        home,
        lambda s: kpi_table(
            session=s,
            start=_parse_time(date_from, "--from"),
            end=_parse_time(date_to, "--to"),
            by=by,
        ),
    )
    _emit({"by": by, "kpis": table, "pareto": pareto})


def register(app: typer.Typer) -> None:
    app.add_typer(spc_app, name="spc")
    app.command("converge")(converge)
    app.command("drift")(drift_cmd)
    app.command("kpi")(kpi_cmd)
