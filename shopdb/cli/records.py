"""Record commands: ``shopdb add ...``, ``shopdb run ...``, ``shopdb user ...``."""

from __future__ import annotations

import json
import os
import sys
from typing import Annotated

import typer

from shopdb.cli.common import AsOpt, HomeOpt, as_actor, opened, parse_time
from shopdb.errors import ShopdbError

add_app = typer.Typer(
    help="Add master data (drawings, lots, parts, machines, stations, references).",
    no_args_is_help=True,
)
run_app = typer.Typer(help="Polishing runs.", no_args_is_help=True)
user_app = typer.Typer(help="User accounts (admin).", no_args_is_help=True)
setting_app = typer.Typer(help="Shop-wide settings (audited).", no_args_is_help=True)


@setting_app.command("show")
def setting_show(home: HomeOpt = None) -> None:
    """The shop's settings, their values and defaults. Needs no password.

    Example: shopdb setting show
    """
    from shopdb.cli.common import read, table
    from shopdb.services import settings

    rows = read(home, lambda shop, s: settings.all_settings(s))
    typer.echo(
        table(
            [(r["key"], str(r["value"]), str(r["default"]), r["meaning"]) for r in rows],
            ["setting", "value", "default", "meaning"],
        )
    )


@setting_app.command("set")
def setting_set(
    key: Annotated[str, typer.Argument(help="decision_rule or reference_u_nm.")],
    value: Annotated[str, typer.Argument(help="The new value.")],
    reason: Annotated[str, typer.Option(help="Why (kept in the audit trail).")] = "",
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Change a shop-wide setting: decision_rule (qa, admin) or reference_u_nm (metrology, admin).

    Example: shopdb setting set reference_u_nm 0.8 --reason "bench survey 2026" --as metrology
    """
    from shopdb.services import settings

    v = _do(
        home,
        as_user,
        lambda s, a: settings.set_value(session=s, actor=a, key=key, value=value, reason=reason),
    )
    typer.echo(f"{key} = {v}")


def _do(home, as_user, fn):
    """Run ``fn(session, actor)`` as the authenticated acting user (see ``as_actor``)."""
    return as_actor(home, as_user, lambda _shop, session, actor: fn(session, actor))


def _drawing_id(session, ref: str) -> int:
    from shopdb.services.lookups import drawing_ref

    return drawing_ref(session, ref).id


@add_app.command("drawing")
def add_drawing(
    number: Annotated[str, typer.Argument(help="Drawing number.")],
    revision: Annotated[str, typer.Option(help="Revision.")],
    callout: Annotated[
        str, typer.Option(help="ISO 10110-5 surface-form callout as on the drawing.")
    ],
    wavelength_nm: Annotated[float, typer.Option("--wavelength-nm", help="Test wavelength, nm.")],
    clear_aperture_mm: Annotated[
        float, typer.Option("--clear-aperture-mm", help="Clear aperture diameter, mm.")
    ],
    radius_mm: Annotated[
        float | None, typer.Option("--radius-mm", help="Nominal radius (omit for a flat).")
    ] = None,
    title: Annotated[str, typer.Option(help="Title.")] = "",
    min_valid: Annotated[
        float, typer.Option("--min-valid", help="Minimum valid-pixel fraction.")
    ] = 0.95,
    decision_rule: Annotated[
        str | None,
        typer.Option(
            "--decision-rule",
            help="simple, strict[:multiple] (guarded acceptance) or lenient[:multiple] "
            "(guarded rejection); default the shop's setting. Fixed with the revision.",
        ),
    ] = None,
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Add a drawing revision (its decision rule cannot change: a new rule is a new revision).

    Example: shopdb add drawing KR-100-W --revision C --callout "3/0.5(0.1); λ = 632.8 nm" --wavelength-nm 632.8 --clear-aperture-mm 90 --decision-rule strict --as admin
    """
    from shopdb.services import masterdata as md

    d = _do(
        home,
        as_user,
        lambda s, a: md.add_drawing(
            session=s,
            actor=a,
            number=number,
            revision=revision,
            surface_form_callout=callout,
            test_wavelength_nm=wavelength_nm,
            clear_aperture_mm=clear_aperture_mm,
            nominal_radius_mm=radius_mm,
            title=title,
            min_valid_fraction=min_valid,
            decision_rule=decision_rule,
        ),
    )
    typer.echo(
        f"drawing {d.number} rev {d.revision} added (id {d.id}), decision rule {d.decision_rule}"
    )


@add_app.command("lot")
def add_lot(
    code: Annotated[str, typer.Argument(help="Lot code.")],
    drawing: Annotated[str, typer.Option(help="Drawing number[:revision].")],
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Add a lot of a drawing.

    Example: shopdb add lot L-2026-014 --drawing KR-100-W
    """
    from shopdb.services import masterdata as md

    lot = _do(
        home,
        as_user,
        lambda s, a: md.add_lot(session=s, actor=a, code=code, drawing_id=_drawing_id(s, drawing)),
    )
    typer.echo(f"lot {lot.code} added (id {lot.id})")


@add_app.command("part")
def add_part(
    serials: Annotated[list[str], typer.Argument(help="Part serials.")],
    drawing: Annotated[str, typer.Option(help="Drawing number[:revision].")],
    lot: Annotated[str | None, typer.Option(help="Lot code.")] = None,
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Add parts.

    Example: shopdb add part W-0101 W-0102 --drawing KR-100-W --lot L-2026-014
    """
    from shopdb.services import masterdata as md
    from shopdb.services.lookups import lot_id

    def fn(s, a):
        lid = lot_id(s, lot) if lot else None
        did = _drawing_id(s, drawing)
        return [
            md.add_part(session=s, actor=a, serial=x, drawing_id=did, lot_id=lid) for x in serials
        ]

    typer.echo(f"{len(_do(home, as_user, fn))} parts added")


@add_app.command("machine")
def add_machine(
    name: Annotated[str, typer.Argument(help="Machine name.")],
    kind: Annotated[str, typer.Option(help="Kind of machine.")] = "",
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Add a polishing machine.

    Example: shopdb add machine "Polisher C" --kind "pitch lap"
    """
    from shopdb.services import masterdata as md

    m = _do(home, as_user, lambda s, a: md.add_machine(session=s, actor=a, name=name, kind=kind))
    typer.echo(f"machine {m.name} added (id {m.id})")


@add_app.command("station")
def add_station(
    name: Annotated[str, typer.Argument(help="Station name.")],
    wavelength_nm: Annotated[float, typer.Option("--wavelength-nm", help="Test wavelength, nm.")],
    reference: Annotated[
        str | None, typer.Option(help="Reference optic whose calibration must be valid.")
    ] = None,
    check_standard: Annotated[
        str | None,
        typer.Option(
            "--check-standard",
            help="Serial of the artefact measured every shift; a release needs it in control.",
        ),
    ] = None,
    check_max_age_days: Annotated[
        float | None,
        typer.Option("--check-max-age-days", help="How old the latest check may be (default 7)."),
    ] = None,
    profile: Annotated[
        str,
        typer.Option(help="Further ingest profile keys as JSON (see README, station profile)."),
    ] = "{}",
    instrument: Annotated[str, typer.Option(help="Instrument description.")] = "",
    no_reference: Annotated[
        bool, typer.Option("--no-reference", help="The station needs no reference calibration.")
    ] = False,
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Add a measurement station with its ingest profile.

    Example: shopdb add station "Bench East" --wavelength-nm 632.8 --reference TF-A --check-standard CS-N --profile '{"format": "x3p", "subtract_reference": true}' --as admin
    """
    from shopdb.services import masterdata as md

    try:
        prof = json.loads(profile)
    except json.JSONDecodeError as exc:
        raise ShopdbError(f"--profile is not JSON: {exc}") from None
    if not isinstance(prof, dict):
        raise ShopdbError("--profile must be a JSON object of profile keys")
    for key, value in (
        ("reference", reference),
        ("check_standard", check_standard),
        ("check_max_age_days", check_max_age_days),
    ):
        if value is not None:
            prof[key] = value
    st = _do(
        home,
        as_user,
        lambda s, a: md.add_station(
            session=s,
            actor=a,
            name=name,
            wavelength_nm=wavelength_nm,
            instrument=instrument,
            requires_reference=not no_reference,
            profile=prof,
        ),
    )
    typer.echo(f"station {st.name} added (id {st.id})")


@add_app.command("reference")
def add_reference(
    name: Annotated[str, typer.Argument(help="Reference optic name.")],
    diameter_mm: Annotated[float, typer.Option("--diameter-mm", help="Diameter, mm.")],
    kind: Annotated[str, typer.Option(help="flat or sphere.")] = "flat",
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Add a reference optic.

    Example: shopdb add reference TF-1 --diameter-mm 150
    """
    from shopdb.services import masterdata as md

    r = _do(
        home,
        as_user,
        lambda s, a: md.add_reference(
            session=s, actor=a, name=name, diameter_mm=diameter_mm, kind=kind
        ),
    )
    typer.echo(f"reference {r.name} added (id {r.id})")


@add_app.command("calibration")
def add_calibration(
    reference: Annotated[str, typer.Argument(help="Reference optic name.")],
    at: Annotated[str, typer.Option("--at", help="Calibration time, ISO 8601 with zone.")],
    valid_until: Annotated[str, typer.Option("--valid-until", help="ISO 8601 with zone.")],
    method: Annotated[str, typer.Option(help="Calibration method.")],
    uncertainty_nm: Annotated[
        float, typer.Option("--uncertainty-nm", help="Standard uncertainty, nm.")
    ],
    coefficients: Annotated[
        str, typer.Option(help='Zernike coefficients JSON {"n,m": nm}.')
    ] = "{}",
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Record a calibration of a reference optic.

    Example: shopdb add calibration TF-1 --at 2026-01-05T10:00Z --valid-until 2026-04-05T10:00Z --method three-flat --uncertainty-nm 1.2 --coefficients '{"2,0": 3.1}'
    """
    from shopdb.services import masterdata as md
    from shopdb.services.lookups import reference_id

    try:
        coefs = {k: float(v) for k, v in json.loads(coefficients).items()}
    except (json.JSONDecodeError, AttributeError, TypeError, ValueError) as exc:
        raise ShopdbError(f"--coefficients: {exc}") from None
    t0, t1 = parse_time(at, "--at"), parse_time(valid_until, "--valid-until")
    if t0 is None or t1 is None:
        raise ShopdbError("--at and --valid-until are required")

    def fn(s, a):
        return md.add_calibration(
            session=s,
            actor=a,
            reference_id=reference_id(s, reference),
            calibrated_at=t0,
            valid_until=t1,
            method=method,
            uncertainty_nm=uncertainty_nm,
            coefficients=coefs,
        )

    c = _do(home, as_user, fn)
    typer.echo(f"calibration {c.id} of {reference} recorded")


@run_app.command("start")
def run_start(
    part: Annotated[str, typer.Argument(help="Part serial.")],
    machine: Annotated[str | None, typer.Option(help="Machine name.")] = None,
    params: Annotated[str, typer.Option(help="Process parameters as JSON.")] = "{}",
    plan: Annotated[
        int | None, typer.Option("--plan", help="The recorded dwell plan this run follows.")
    ] = None,
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Start the part's next polishing iteration (optionally following a recorded plan).

    Example: shopdb run start 100-4000 --machine "Lap 4" --params '{"pad": "std", "pressure_kpa": 3.5}' --as lead
    """
    from shopdb.services import masterdata as md

    try:
        p = json.loads(params)
    except json.JSONDecodeError as exc:
        raise ShopdbError(f"--params is not JSON: {exc}") from None
    if not isinstance(p, dict):
        raise ShopdbError("--params must be a JSON object")
    if plan is not None:
        p["plan_id"] = plan
    r = _do(
        home,
        as_user,
        lambda s, a: md.start_run(
            session=s, actor=a, part_serial=part, machine_name=machine, params=p
        ),
    )
    typer.echo(f"run {r.iteration} of {part} started (id {r.id})")


@run_app.command("end")
def run_end(
    part: Annotated[str, typer.Argument(help="Part serial.")],
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """End the part's latest polishing run.

    Example: shopdb run end 100-4000 --as lead
    """
    from shopdb.services import masterdata as md

    r = _do(home, as_user, lambda s, a: md.end_run(session=s, actor=a, part_serial=part))
    typer.echo(f"run {r.iteration} of {part} ended")


def _new_password(username: str) -> str:
    """The new password: $SHOPDB_NEW_PASSWORD (scripts), or asked twice at a prompt."""
    pw = os.environ.get("SHOPDB_NEW_PASSWORD")
    if pw is not None:
        return pw
    if not sys.stdin.isatty():
        raise ShopdbError(
            f"no new password for {username}: set SHOPDB_NEW_PASSWORD or run interactively"
        )
    return typer.prompt(f"new password for {username}", hide_input=True, confirmation_prompt=True)


@user_app.command("add")
def user_add(
    username: Annotated[str, typer.Argument(help="User name.")],
    role: Annotated[str, typer.Option(help="operator, lead, qa, metrology, manager or admin.")],
    name: Annotated[str, typer.Option(help="Printed name (used on signatures).")],
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Add a user (admin). The very first user of a shop, who must be admin, needs no --as.
    The password comes from a prompt (asked twice) or $SHOPDB_NEW_PASSWORD.

    Example: shopdb user add iqa --role qa --name "I. Calloway" --as admin
    """
    from shopdb.cli.common import actor
    from shopdb.services import users

    with opened(home) as shop:
        with shop.read() as s:
            first = not users.any_user(session=s)
        acting = None if first else actor(shop, as_user)
        password = _new_password(username)
        with shop.write() as s:
            u = users.add_user(
                session=s,
                actor=acting,
                username=username,
                display_name=name,
                role=role,
                password=password,
            )
    typer.echo(f"user {u.username} ({u.role}) added")


@user_app.command("disable")
def user_disable(
    username: Annotated[str, typer.Argument(help="User name.")],
    reason: Annotated[str, typer.Option(help="Why.")] = "",
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Disable an account (accounts are never deleted).

    Example: shopdb user disable pim --reason "left the company" --as admin
    """
    from shopdb.services import users

    _do(
        home,
        as_user,
        lambda s, a: users.disable_user(session=s, actor=a, username=username, reason=reason),
    )
    typer.echo(f"user {username} disabled")


@user_app.command("set-role")
def user_set_role(
    username: Annotated[str, typer.Argument(help="User name.")],
    role: Annotated[str, typer.Argument(help="New role.")],
    reason: Annotated[str, typer.Option(help="Why.")] = "",
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Change a user's role.

    Example: shopdb user set-role pim lead --as admin
    """
    from shopdb.services import users

    _do(
        home,
        as_user,
        lambda s, a: users.set_role(
            session=s, actor=a, username=username, role=role, reason=reason
        ),
    )
    typer.echo(f"user {username} is now {role}")


@user_app.command("passwd")
def user_passwd(
    username: Annotated[str, typer.Argument(help="User name.")],
    as_user: AsOpt = None,
    home: HomeOpt = None,
) -> None:
    """Set a user's password (your own, or anyone's as admin).

    Example: shopdb user passwd pim --as admin
    """
    from shopdb.services import users

    _do(
        home,
        as_user,
        lambda s, a: users.set_password(
            session=s, actor=a, username=username, password=_new_password(username)
        ),
    )
    typer.echo(f"password of {username} changed")


def register(app: typer.Typer) -> None:
    app.add_typer(add_app, name="add")
    app.add_typer(run_app, name="run")
    app.add_typer(user_app, name="user")
    app.add_typer(setting_app, name="setting")
