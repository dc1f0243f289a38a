"""Polishing guidance: ``shopdb plan`` (the dwell map of a sub-aperture machine's next run) and
``shopdb removal part|machines|rank`` (what runs removed, per machine, and which lap next)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from shopdb.cli.common import AsOpt, HomeOpt, JsonOpt, as_actor, emit_json, read, table, when
from shopdb.errors import ShopdbError


def _tif_from_options(sigma, peak, spot, spot_dwell, spot_diameter):
    """A Gaussian TIF from --tif-sigma/--tif-peak or a measured one from --spot (or None)."""
    from shopdb.services import plan as planning
    from shopdb.surface.dwell import GaussianTIF

    if spot is not None:
        if sigma is not None or peak is not None:
            raise ShopdbError("--spot: give a measured TIF or a Gaussian one, not both")
        if not (spot_dwell > 0 and spot_diameter > 0):
            raise ShopdbError("--spot needs --spot-dwell and --spot-diameter (positive)")
        return planning.spot_tif_from_files(
            str(spot[0]), str(spot[1]), dwell_s=spot_dwell, diameter_mm=spot_diameter
        )
    if sigma is None and peak is None:
        return None
    if sigma is None or peak is None:
        raise ShopdbError("a Gaussian TIF needs both --tif-sigma and --tif-peak")
    try:
        return GaussianTIF(sigma_mm=sigma, peak_nm_per_s=peak)
    except ValueError as exc:
        raise ShopdbError(f"--tif-sigma/--tif-peak: {exc}") from None


SigmaOpt = Annotated[float | None, typer.Option("--tif-sigma", help="Gaussian TIF: sigma, mm.")]
PeakOpt = Annotated[
    float | None, typer.Option("--tif-peak", help="Gaussian TIF: peak removal rate, nm/s.")
]
SpotOpt = Annotated[
    tuple[Path, Path] | None,
    typer.Option("--spot", help="Measured TIF: the spot test's map before and after."),
]
SpotDwellOpt = Annotated[float, typer.Option(help="Dwell of the spot test, s.")]
SpotDiameterOpt = Annotated[float, typer.Option(help="Diameter to cut the spot to, mm.")]


def plan(
    serial: Annotated[
        str, typer.Argument(help="Part serial: its final measurement is planned on.")
    ],
    tif_name: Annotated[
        str | None, typer.Option("--tif", help="A recorded TIF by name ('shopdb tif list').")
    ] = None,
    machine: Annotated[
        str | None, typer.Option(help="The machine of --tif, where names repeat.")
    ] = None,
    sigma: SigmaOpt = None,
    peak: PeakOpt = None,
    spot: SpotOpt = None,
    spot_dwell: SpotDwellOpt = 0.0,
    spot_diameter: SpotDiameterOpt = 0.0,
    spacing: Annotated[float, typer.Option(help="Machine grid spacing, mm.")] = 1.0,
    margin: Annotated[
        float | None,
        typer.Option(help="How far past the aperture the tool centre may go, mm (TIF radius)."),
    ] = None,
    dwell_csv: Annotated[
        Path | None, typer.Option("--dwell-csv", help="Write the dwell grid (x_mm,y_mm,dwell_s).")
    ] = None,
    predicted: Annotated[
        Path | None,
        typer.Option("--predicted", help="Write the predicted map (.x3p, .npz, .csv ...)."),
    ] = None,
    record: Annotated[
        bool, typer.Option("--record", help="Keep the plan (needs --tif and --as: lead, admin).")
    ] = False,
    as_user: AsOpt = None,
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Plan the next run of a sub-aperture machine: the dwell map that removes the part's
    error, its total time and the predicted result with its verdict against the drawing; with
    --record the plan is kept, and the run that follows names it (run start --plan).

    A prediction: it supports, never replaces, the lead's judgement and the drawing.

    Example: shopdb plan 150-0100 --tif-sigma 2.5 --tif-peak 2 --dwell-csv dwell.csv --predicted next.x3p
    """
    from shopdb.quantities import period_range
    from shopdb.services import plan as planning

    given = _tif_from_options(sigma, peak, spot, spot_dwell, spot_diameter)
    if (given is None) == (tif_name is None):
        raise ShopdbError(
            "give the TIF: --tif NAME (recorded), or --tif-sigma and --tif-peak, "
            "or --spot BEFORE AFTER"
        )
    if record and tif_name is None:
        raise ShopdbError("--record needs a recorded TIF (--tif NAME), so the plan names it")
    if predicted is not None:
        planning.check_predicted_path(str(predicted))
    if not spacing > 0:
        raise ShopdbError(f"--spacing {spacing}: must be positive")

    def make(shop, s):
        row = planning.tool_influence(s, tif_name, machine) if tif_name else None
        tif = planning.tif_model(row, shop.blobs) if row is not None else given
        out = planning.plan_next_run(
            session=s,
            blobs=shop.blobs,
            serial=serial,
            tif=tif,
            spacing_mm=spacing,
            margin_mm=margin,
        )
        return out, row

    def keep(shop, s, actor):
        out, row = make(shop, s)
        kept = planning.record_plan(session=s, blobs=shop.blobs, actor=actor, out=out, tif_row=row)
        return out | {"plan_id": kept.id}

    out = as_actor(home, as_user, keep) if record else read(home, make)[0]
    written = planning.export_plan(
        out,
        dwell_csv=str(dwell_csv) if dwell_csv else None,
        predicted=str(predicted) if predicted else None,
    )
    if as_json:
        emit_json({k: v for k, v in out.items() if k not in planning.NOT_JSON} | {"files": written})
        return
    b, p = out["before"], out["predicted"]
    typer.echo(f"plan for {out['part']} ({out['drawing']}), measurement {out['measurement_id']}")
    typer.echo(
        f"TIF {out['tif']['kind'].removesuffix('TIF').lower()}, "
        f"{out['tif']['diameter_mm']:.1f} mm, {out['tif']['volume_rate_mm3_per_min']:.4f} mm³/min; "
        f"grid {out['spacing_mm']:.2f} mm, {out['grid_points']} points, "
        f"total dwell {out['total_time_min']:.1f} min"
    )
    typer.echo(f"{'':26}{'now':>10}{'predicted':>12}")
    for label, key in (("PV", "pv_nm"), ("RMS", "rms_nm"), ("irregularity", "irregularity_nm")):
        typer.echo(f"{label + ' (nm)':26}{b[key]:>10.2f}{p[key]:>12.2f}")
    for bb, pb in zip(b["bands"], p["bands"], strict=True):
        label = f"RMS {period_range(pb['low_per_mm'], pb['high_per_mm'])} (nm)"
        typer.echo(f"{label:26}{bb['rms_nm']:>10.2f}{pb['rms_nm']:>12.2f}")
    fails = ", ".join(out["failed_fields"])
    typer.echo(f"predicted verdict: {out['verdict'].upper()}" + (f" ({fails})" if fails else ""))
    for f in written:
        typer.echo(f"wrote {f}")
    if "plan_id" in out:
        typer.echo(
            f"recorded as plan {out['plan_id']}: start the run with "
            f"'shopdb run start {out['part']} --plan {out['plan_id']}'"
        )


removal_app = typer.Typer(
    help="What each polishing run removed, per machine over time, and which lap next.",
    no_args_is_help=True,
)


def _nm(x):
    return None if x is None else round(x, 2)


@removal_app.command("part")
def removal_part(
    serial: Annotated[str, typer.Argument(help="Part serial.")],
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Run by run: the machine and pad, what the run removed (RMS, PV, depth where recorded),
    Preston's coefficient, and the ratio after/before per PSD band (convergence per band: above
    1 in a fine band, the run added ripple).

    Example: shopdb removal part 150-0100
    """
    from shopdb.quantities import period_range
    from shopdb.services import removal

    tz, rows = read(
        home,
        lambda shop, s: (shop.settings.timezone, removal.part_removals(session=s, serial=serial)),
    )
    if as_json:
        emit_json(rows)
        return
    edges: list = next((r["ratio_bands"] for r in rows if r["ratio_bands"]), [])
    names = [period_range(lo, hi) for lo, hi in edges]
    typer.echo(
        table(
            [
                [
                    r["iteration"],
                    r["machine"],
                    r["pad"],
                    when(r["started_at"], tz),
                    _nm(r["removal_rms_nm"]),
                    None if r["depth_nm"] is None else round(r["depth_nm"]),
                    None if r["preston_per_pa"] is None else f"{r['preston_per_pa']:.3g}",
                    *[None if x is None else round(x, 2) for x in r["band_ratio"][: len(names)]],
                ]
                for r in rows
            ],
            ["run", "machine", "pad", "started", "removal RMS (nm)", "depth (nm)", "k_p (1/Pa)"]
            + [f"ratio {n}" for n in names],
        )
    )


@removal_app.command("machines")
def removal_machines(
    drawing: Annotated[str | None, typer.Option(help="Only runs on parts of this drawing.")] = None,
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Per machine: runs, mean removal RMS, the mean shape of its removal (largest Zernike
    terms) and Preston's coefficient per pad (a pad or slurry change shows as a shift).

    Example: shopdb removal machines
    """
    from shopdb.services import removal
    from shopdb.surface.zernike import name as term_name

    rows = read(home, lambda shop, s: removal.machine_removals(session=s, drawing=drawing))
    if as_json:
        emit_json(rows)
        return
    out = []
    for e in rows:
        kp = [r["preston_per_pa"] for r in e["runs"] if r["preston_per_pa"] is not None]
        pads: dict[str, list[float]] = {}
        for r in e["runs"]:
            if r["preston_per_pa"] is not None:
                pads.setdefault(r["pad"] or "-", []).append(r["preston_per_pa"])
        out.append(
            [
                e["machine"],
                len(e["runs"]),
                _nm(e["mean_removal_rms_nm"]),
                ", ".join(f"{term_name(n, m)} {c:+.1f}" for n, m, c in e["mean_shape_nm"][:3]),
                "; ".join(f"{p} {sum(v) / len(v):.3g}" for p, v in pads.items()) if kp else None,
            ]
        )
    typer.echo(
        table(
            out,
            ["machine", "runs", "mean removal RMS (nm)", "mean shape (nm)", "k_p by pad (1/Pa)"],
        )
    )


@removal_app.command("rank")
def removal_rank(
    serial: Annotated[str, typer.Argument(help="Part serial: its final measurement.")],
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Which lap for the part's next run: each full-aperture machine's recent removals on the
    drawing applied to the part's current map, the predicted irregularity mean ± spread, best
    first. A prediction from the record: it supports, never replaces, the lead's judgement.

    Example: shopdb removal rank 150-0100
    """
    from shopdb.services import removal

    rows = read(
        home, lambda shop, s: removal.rank_machines(session=s, blobs=shop.blobs, serial=serial)
    )
    if as_json:
        emit_json(rows)
        return
    if not rows:
        typer.echo(f"no full-aperture machine has two or more removals on {serial}'s drawing")
        return
    typer.echo(f"{serial}: irregularity now {rows[0]['now_irregularity_nm']:.1f} nm")
    for r in rows:
        typer.echo(
            f"  {r['machine']}: irregularity {r['irregularity_nm']:.1f} ± {r['spread_nm']:.1f} nm "
            f"(from {r['removals']} removals)"
        )


@removal_app.command("plans")
def removal_plans(
    machine: Annotated[str | None, typer.Option(help="Only this machine.")] = None,
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Recorded plans against what the runs that followed them achieved: planned and measured
    RMS and irregularity, per machine, oldest first.

    Example: shopdb removal plans --machine "CNC 3"
    """
    from shopdb.services import plan as planning

    tz, rows = read(
        home,
        lambda shop, s: (
            shop.settings.timezone,
            planning.plans_against_runs(session=s, machine=machine),
        ),
    )
    if as_json:
        emit_json(rows)
        return
    if not rows:
        typer.echo("no run has followed a recorded plan yet")
        return
    typer.echo(
        table(
            [
                [
                    r["machine"],
                    r["part"],
                    r["iteration"],
                    r["plan_id"],
                    when(r["started_at"], tz),
                    _nm(r["predicted_rms_nm"]),
                    _nm(r["achieved_rms_nm"]),
                    _nm(r["predicted_irregularity_nm"]),
                    _nm(r["achieved_irregularity_nm"]),
                ]
                for r in rows
            ],
            [
                "machine",
                "part",
                "run",
                "plan",
                "started",
                "RMS planned (nm)",
                "RMS achieved (nm)",
                "irr. planned (nm)",
                "irr. achieved (nm)",
            ],
        )
    )


tif_app = typer.Typer(
    help="Tool influence functions of sub-aperture machines.", no_args_is_help=True
)


@tif_app.command("add")
def tif_add(
    machine: Annotated[str, typer.Option(help="The machine the tool runs on.")],
    name: Annotated[str, typer.Option(help="A name for tool and pad, e.g. 'T20 P-22'.")],
    sigma: SigmaOpt = None,
    peak: PeakOpt = None,
    spot: SpotOpt = None,
    spot_dwell: SpotDwellOpt = 0.0,
    spot_diameter: SpotDiameterOpt = 0.0,
    notes: Annotated[str, typer.Option(help="Free text.")] = "",
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Record a machine's tool influence function, a Gaussian model or a spot test (lead, admin).

    Example: shopdb tif add --machine "CNC 3" --name "T20 P-22" --tif-sigma 2.5 --tif-peak 2 --as lead
    """
    from shopdb.services import plan as planning

    tif = _tif_from_options(sigma, peak, spot, spot_dwell, spot_diameter)
    if tif is None:
        raise ShopdbError("give the TIF: --tif-sigma and --tif-peak, or --spot BEFORE AFTER")
    row = as_actor(
        home,
        as_user,
        lambda shop, s, a: planning.add_tool_influence(
            session=s, blobs=shop.blobs, actor=a, machine=machine, name=name, tif=tif, notes=notes
        ),
    )
    typer.echo(
        f"TIF {row.name!r} on {machine} recorded (id {row.id}, "
        f"{tif.volume_rate_mm3_per_min:.4f} mm³/min)"
    )


@tif_app.command("list")
def tif_list(as_json: JsonOpt = False, home: HomeOpt = None) -> None:
    """The recorded tool influence functions, the newest of each name.

    Example: shopdb tif list
    """
    from shopdb.services import plan as planning

    tz, rows = read(
        home, lambda shop, s: (shop.settings.timezone, planning.list_tool_influences(session=s))
    )
    if as_json:
        emit_json(rows)
        return
    typer.echo(
        table(
            [
                [
                    r["machine"],
                    r["name"],
                    r["kind"],
                    ", ".join(f"{k} {v:.4g}" for k, v in r["params"].items()),
                    when(r["recorded_at"], tz),
                ]
                for r in rows
            ],
            ["machine", "name", "kind", "parameters", "recorded"],
        )
    )


def register(app: typer.Typer) -> None:
    app.command("plan")(plan)
    app.add_typer(removal_app, name="removal")
    app.add_typer(tif_app, name="tif")
