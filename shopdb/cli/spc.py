"""Process commands: ``shopdb spc chart|capability``, ``converge``, ``parts``, ``drift``, ``kpi``.
All of them only read: none needs a password."""

from __future__ import annotations

import math
from typing import Annotated

import typer

from shopdb.cli.common import HomeOpt, JsonOpt, emit_json, parse_time, read, table, when
from shopdb.quantities import metric_help

spc_app = typer.Typer(help="Control charts and capability.", no_args_is_help=True)
MetricOpt = Annotated[str, typer.Option(help=f"Metric: {metric_help()}.")]


@spc_app.command("chart")
def chart(
    metric: MetricOpt = "rms_nm",
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
    signals: Annotated[int, typer.Option(help="Latest signals listed per chart.")] = 5,
    as_json: Annotated[
        bool, typer.Option("--json", help="Print the per-point table as JSON.")
    ] = False,
    home: HomeOpt = None,
) -> None:
    """Control chart of a metric: centre, limits, and the latest signals in plain words.

    Example: shopdb spc chart --metric band:3 --drawing KR-100-W --by machine --phase-by pad
    """
    from shopdb.services.reads.charts import control_chart, quantity_of

    q = quantity_of(metric)
    tz, t = read(
        home,
        lambda shop, s: (
            shop.settings.timezone,
            control_chart(
                session=s,
                metric=metric,
                drawing=drawing,
                by=by,
                chart=chart_type,
                phase_by=phase_by,
                start=parse_time(date_from, "--from"),
                end=parse_time(date_to, "--to"),
                rule_set=rules,
            ),
        ),
    )
    if as_json:
        emit_json(
            {"metric": metric, "chart": chart_type, "points": t.drop(columns=["run_params"])}
            if not t.empty
            else {"metric": metric, "chart": chart_type, "points": []}
        )
        return
    if t.empty:
        typer.echo("no data: fewer than two measurements of this metric")
        return
    typer.echo(f"{q.title}, {chart_type} chart")
    for g, gt in t.groupby("group"):
        fired = gt[gt["rules"].map(len) > 0]
        last = gt.iloc[-1]
        typer.echo(
            f"{g}: {len(gt)} points, phase {last['phase']}: centre {last['centre']:.3f}, "
            f"UCL {last['ucl']:.3f}, LCL {last['lcl']:.3f} {q.unit}; {len(fired)} signals"
        )
        shown = fired.tail(signals)
        for _, r in shown.iterrows():
            typer.echo(
                f"    {when(r['measured_at'], tz)} {r['part']}: {r['statistic']:.3f} - {r['explanation']}"
            )
        if len(fired) > len(shown):
            typer.echo(
                f"    ... {len(fired) - len(shown)} earlier signals not listed (--signals N)"
            )


@spc_app.command("capability")
def capability_cmd(
    metric: MetricOpt,
    drawing: Annotated[str, typer.Option(help="Drawing number.")],
    usl: Annotated[
        float, typer.Option(help="Upper specification limit (same unit as the metric).")
    ],
    lsl: Annotated[float | None, typer.Option(help="Lower limit (omit for one-sided).")] = None,
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Capability of a metric against a specification (the last measurement of each of the
    drawing's parts).

    Example: shopdb spc capability --metric irregularity_nm --drawing KR-100-W --usl 31.6
    """
    from shopdb.services.reads.charts import finished_capability

    c = read(
        home,
        lambda shop, s: finished_capability(
            session=s, metric=metric, drawing=drawing, usl=usl, lsl=lsl
        ),
    )
    if as_json:
        emit_json(c)
        return
    d = c.as_dict()
    rows = [(k, v) for k, v in d.items() if isinstance(v, int | float) and not isinstance(v, bool)]
    typer.echo(table(rows, ["index", "value"]))
    if d.get("method_note"):
        typer.echo(d["method_note"])


def converge(
    part: Annotated[str, typer.Argument(help="Part serial.")],
    metric: Annotated[
        str | None,
        typer.Option(help="Metric (default: the first field the drawing limits after the sag)."),
    ] = None,
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Run-to-run convergence of a part and the forecast of further runs to its tolerance.

    Example: shopdb converge 150-0100
    """
    from shopdb.services.reads.charts import part_convergence

    tz, info = read(
        home,
        lambda shop, s: (
            shop.settings.timezone,
            part_convergence(session=s, serial=part, metric=metric),
        ),
    )
    if as_json:
        emit_json({k: v for k, v in info.items() if k != "quantity"})
        return
    q, c = info["quantity"], info["convergence"]
    tol = info["tolerance"]
    typer.echo(
        f"part {info['part']} ({info['drawing']}): {q.title}"
        + (f", tolerance {tol:.1f} {q.unit}" if tol is not None else "")
    )
    runs = info["per_run"]
    if runs.empty:
        typer.echo("no measurement after a polishing run yet")
        return
    typer.echo(
        table(
            [
                (int(r.iteration), r.machine, when(r.measured_at, tz), abs(r.value))
                for r in runs.itertuples()
            ],
            ["run", "machine", "measured", f"{q.label} ({q.unit})"],
        )
    )
    typer.echo(f"status: {c.status}")
    if c.ratio is not None:
        typer.echo(f"ratio per run {c.ratio:.2f}, floor {c.floor:.2f} {q.unit}")
    if c.runs_remaining is not None:
        lo, hi = c.runs_interval or (None, None)
        rng = (
            f" (5-95 %: {lo:.0f} to {'never' if math.isinf(hi) else f'{hi:.0f}'})"
            if lo is not None and hi is not None
            else ""
        )
        typer.echo(f"forecast: {c.runs_remaining:.0f} more runs{rng}")
    for note in c.notes:
        typer.echo(f"note: {note}")


def parts_cmd(
    status: Annotated[
        str | None,
        typer.Option(help="Only parts with this status: diverging, stalled, converging, ..."),
    ] = None,
    drawing: Annotated[str | None, typer.Option(help="Drawing number.")] = None,
    machine: Annotated[str | None, typer.Option(help="Machine of the latest run.")] = None,
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Parts in process: status (stalled and diverging first), runs to spec and its interval.

    Example: shopdb parts --status stalled
    """
    from shopdb.services.reads.pages import parts_in_process

    rows = read(
        home,
        lambda shop, s: parts_in_process(
            session=s, status=status, drawing=drawing, machine=machine
        ),
    )
    if as_json:
        emit_json(rows)
        return
    if rows.empty:
        typer.echo("no part in process matches")
        return
    typer.echo(
        table(
            [
                (
                    r.part,
                    r.drawing,
                    r.machine,
                    int(r.iteration),
                    r.status,
                    r.latest,
                    r.tolerance,
                    r.runs_to_spec,
                    r.interval,
                )
                for r in rows.itertuples()
            ],
            [
                "part",
                "drawing",
                "machine",
                "run",
                "status",
                "latest (nm)",
                "tolerance (nm)",
                "runs to spec",
                "5-95 %",
            ],
        )
    )


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
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Drift of a reference optic's calibrations: rate, band, due date, and optionally the
    measurements whose verdict the drift would change.

    Example: shopdb drift TF-B --term 2,0 --threshold-nm 3 --impact
    """
    from shopdb.services.reads.drift import drift_impact, reference_drift

    def fn(shop, s):
        out = reference_drift(session=s, reference=reference, term=term, threshold_nm=threshold_nm)
        if impact:
            out["impact"] = drift_impact(session=s, reference=reference)
        return shop.settings.timezone, out

    tz, info = read(home, fn)
    if as_json:
        emit_json(info)
        return
    d = info["drift"]
    typer.echo(
        f"reference {info['reference']}, {info['term']}: {len(info['calibrations'])} calibrations"
    )
    if info["last_calibration"] is not None:
        typer.echo(
            f"last calibration {when(info['last_calibration'], tz)}, valid until "
            f"{when(info['valid_until'], tz)}" + ("  OVERDUE" if info["overdue"] else "")
        )
    if d is None:
        typer.echo("drift: at least three calibrations are needed")
    else:
        typer.echo(
            f"drift {d.rate_per_month:+.2f} nm/month (95 % {d.rate_ci[0]:+.2f} to "
            f"{d.rate_ci[1]:+.2f}); predicted change since the last calibration "
            f"{d.predicted_change_since_last:+.2f} nm"
        )
        if d.exceeds_at is not None:
            typer.echo(f"reaches {d.threshold:g} nm on {when(d.exceeds_at, tz)}")
    if impact:
        imp = info["impact"]
        if imp.empty:
            typer.echo("impact: no verdict would change")
        else:
            typer.echo(
                table(
                    [
                        (
                            r.part,
                            r.lot,
                            r.lot_status,
                            when(r.measured_at, tz),
                            r.verdict,
                            r.verdict_if_corrected,
                        )
                        for r in imp.itertuples()
                    ],
                    ["part", "lot", "lot status", "measured", "verdict", "if corrected"],
                )
            )


def kpi_cmd(
    date_from: Annotated[str | None, typer.Option("--from", help="ISO time with zone.")] = None,
    date_to: Annotated[str | None, typer.Option("--to", help="ISO time with zone.")] = None,
    by: Annotated[str, typer.Option(help="month, week, drawing or machine.")] = "month",
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """First-pass yield, rework, scrap, iterations and cycle time, grouped; and the Pareto of
    the callout fields that failed.

    Example: shopdb kpi --from 2026-01-01T00:00Z --by month
    """
    from shopdb.services.reads.kpi import kpi_table

    table_, pareto = read(
        home,
        lambda shop, s: kpi_table(
            session=s,
            start=parse_time(date_from, "--from"),
            end=parse_time(date_to, "--to"),
            by=by,
        ),
    )
    if as_json:
        emit_json({"by": by, "kpis": table_, "pareto": pareto})
        return
    if table_.empty:
        typer.echo("no part has reached a final inspection in this period")
        return
    typer.echo(
        table(
            [
                (
                    r.group,
                    int(r.inspected),
                    f"{r.first_pass_yield:.0%}",
                    f"{r.rework_rate:.0%}",
                    f"{r.scrap_rate:.0%}",
                    r.mean_iterations,
                    r.mean_cycle_days,
                )
                for r in table_.itertuples()
            ],
            [
                by,
                "inspected",
                "first-pass yield",
                "rework",
                "scrap",
                "runs to spec",
                "cycle (days)",
            ],
        )
    )
    if not pareto.empty:
        typer.echo("failed at first final inspection:")
        typer.echo(
            table(
                [(r.label, int(r.count), f"{r.cumulative_share:.0%}") for r in pareto.itertuples()],
                ["callout field", "parts", "cumulative"],
            )
        )


def register(app: typer.Typer) -> None:
    app.add_typer(spc_app, name="spc")
    app.command("converge")(converge)
    app.command("parts")(parts_cmd)
    app.command("drift")(drift_cmd)
    app.command("kpi")(kpi_cmd)
