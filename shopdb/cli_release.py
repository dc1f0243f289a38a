"""Release commands: ``shopdb lot ...``, ``shopdb certificate``, ``shopdb audit verify|export``."""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path
from typing import Annotated

import typer

from shopdb.cli_common import AsOpt, HomeOpt, _actor, _as_actor, _open
from shopdb.errors import PermissionDenied, ShopdbError

lot_app = typer.Typer(
    help="Lot release: evidence, dispositions, signatures (qa).", no_args_is_help=True
)
audit_app = typer.Typer(help="The tamper-evident audit trail.", no_args_is_help=True)


def _fmt_part(p: dict) -> str:
    fails = [f["field"] for f in p["fields"] if not f["passed"]]
    why = "; ".join(p["blocked"]) or (f"fails {', '.join(fails)}" if fails else "")
    d = p["disposition"]
    dec = (
        f"  [{d['decision']}{' ' + d['deviation_number'] if d['deviation_number'] else ''}]"
        if d
        else ""
    )
    return f"  {p['serial']:<12} {p['verdict']:<8}{dec}  {why}".rstrip()


@lot_app.command("list")
def lot_list(
    all_lots: Annotated[bool, typer.Option("--all", help="Signed lots too.")] = False,
    home: HomeOpt = None,
    as_user: AsOpt = None,
) -> None:
    """Lots awaiting release (open), with how many parts are disposed.

    Example: shopdb lot list --as qa
    """
    from shopdb.services import release

    rows = _as_actor(
        home,
        as_user,
        lambda shop, s, a: release.lots(session=s, actor=a, include_signed=all_lots),
    )
    for r in rows:
        typer.echo(
            f"{r['lot']:<12} {r['status']:<9} {r['drawing']:<14} "
            f"{r['disposed']}/{r['parts']} parts disposed"
        )
    if not rows:
        typer.echo("no open lots" if not all_lots else "no lots")


@lot_app.command("show")
def lot_show(
    code: Annotated[str, typer.Argument(help="Lot code.")],
    as_json: Annotated[bool, typer.Option("--json", help="Print the evidence as JSON.")] = False,
    home: HomeOpt = None,
    as_user: AsOpt = None,
) -> None:
    """A lot's evidence: per part verdict, reasons, disposition; signatures and whether they verify.

    Example: shopdb lot show L-2606 --as qa
    """
    from shopdb.services import release

    ev = _as_actor(
        home,
        as_user,
        lambda shop, s, a: release.lot_evidence(session=s, blobs=shop.blobs, actor=a, code=code),
    )
    if as_json:
        typer.echo(json.dumps(ev, default=str))
        return
    typer.echo(f"lot {ev['lot']} ({ev['status']}), drawing {ev['drawing']}: {ev['callout']}")
    for p in ev["parts"]:
        typer.echo(_fmt_part(p))
    for sig in ev["signatures"]:
        state = "verifies" if sig["ok"] else f"DOES NOT VERIFY: {sig['problem']}"
        typer.echo(
            f"  signed {sig['meaning']} by {sig['printed_name']} at {sig['signed_at']}: {state}"
        )


@lot_app.command("dispose")
def lot_dispose(
    code: Annotated[str, typer.Argument(help="Lot code.")],
    serial: Annotated[str, typer.Argument(help="Part serial.")],
    decision: Annotated[str, typer.Option(help="accept, accept_deviation, rework or reject.")],
    reason: Annotated[str, typer.Option(help="Reason (needed except for a plain accept).")] = "",
    deviation: Annotated[
        str | None, typer.Option("--deviation", help="Deviation number (accept_deviation).")
    ] = None,
    measurement: Annotated[
        int | None,
        typer.Option(help="Judge this measurement instead of the final one (needs a reason)."),
    ] = None,
    home: HomeOpt = None,
    as_user: AsOpt = None,
) -> None:
    """Record QA's decision on one part of a lot (a later decision supersedes it).

    Example: shopdb lot dispose L-2606 100-0600 --decision rework --reason "irregularity over B" --as qa
    """
    from shopdb.services import release

    def fn(shop, s, actor):
        d = release.dispose(
            session=s,
            blobs=shop.blobs,
            actor=actor,
            code=code,
            serial=serial,
            decision=decision,
            reason=reason,
            deviation_number=deviation,
            measurement_id=measurement,
        )
        return f"{serial}: {decision} (disposition {d.id}, verdict {d.verdict['verdict']})"

    typer.echo(_as_actor(home, as_user, fn))


@lot_app.command("sign")
def lot_sign(
    code: Annotated[str, typer.Argument(help="Lot code.")],
    meaning: Annotated[str, typer.Option(help="released, rejected or reviewed.")] = "released",
    home: HomeOpt = None,
    as_user: AsOpt = None,
) -> None:
    """Sign a lot. The password is asked again at the moment of signing ($SHOPDB_PASSWORD in scripts).

    Example: shopdb lot sign L-2606 --meaning released --as qa
    """
    from shopdb.services import release

    password = os.environ.get("SHOPDB_PASSWORD")
    if password is None:
        if not sys.stdin.isatty():
            raise ShopdbError(
                "signing needs the password: set SHOPDB_PASSWORD or run interactively"
            )
        password = typer.prompt("re-enter your password to sign", hide_input=True)
    shop = _open(home)
    try:
        with shop.write() as session:
            actor = _actor(session, as_user)
            try:
                sig = release.sign(
                    session=session,
                    actor=actor,
                    code=code,
                    password=password,
                    meaning=meaning,
                    allow_self_release=shop.settings.allow_self_release,
                )
            except PermissionDenied:
                session.commit()  # keep a failed password count; nothing else was written
                raise
            typer.echo(
                f"lot {code} signed {meaning} by {sig.printed_name} at "
                f"{sig.signed_at:%Y-%m-%d %H:%M:%S} UTC; evidence SHA-256 {sig.evidence_sha256}"
            )
    finally:
        shop.engine.dispose()


@lot_app.command("verify")
def lot_verify(
    code: Annotated[str, typer.Argument(help="Lot code.")],
    home: HomeOpt = None,
    as_user: AsOpt = None,
) -> None:
    """Recompute each signature's evidence hash; exit 1 if any no longer matches.

    Example: shopdb lot verify L-2605 --as qa
    """
    from shopdb.services import release

    sigs = _as_actor(home, as_user, lambda shop, s, a: release.verify_lot(session=s, code=code))
    if not sigs:
        raise ShopdbError(f"lot {code} has no signatures")
    for sig in sigs:
        state = "verifies" if sig["ok"] else f"DOES NOT VERIFY: {sig['problem']}"
        typer.echo(f"signature {sig['id']} ({sig['meaning']}, {sig['printed_name']}): {state}")
    if not all(s["ok"] for s in sigs):
        raise typer.Exit(1)


def certificate(
    code: Annotated[str, typer.Argument(help="Lot code (released).")],
    output: Annotated[Path, typer.Option("-o", "--output", help="File to write: .pdf or .html.")],
    shop_name: Annotated[
        str | None,
        typer.Option("--shop-name", help="Header line (default $SHOPDB_SHOP_NAME)."),
    ] = None,
    home: HomeOpt = None,
    as_user: AsOpt = None,
) -> None:
    """Certificate of conformance of a released lot, as PDF or HTML (by the file's suffix).

    Example: shopdb certificate L-2605 -o L-2605.pdf --shop-name "Kestrel Ridge Optics" --as qa
    """
    from shopdb.services import certificate as cert

    suffix = output.suffix.lower()
    if suffix not in (".pdf", ".html", ".htm"):
        raise ShopdbError(f"--output {output}: the file must end in .pdf or .html")

    def fn(shop, s, actor):
        data = cert.certificate_data(
            session=s,
            blobs=shop.blobs,
            actor=actor,
            code=code,
            shop_name=shop_name or shop.settings.shop_name,
        )
        return data, (
            cert.render_pdf(data) if suffix == ".pdf" else cert.render_html(data).encode()
        )

    data, body = _as_actor(home, as_user, fn)
    tmp = output.with_name(output.name + ".part")
    try:
        tmp.write_bytes(body)
        tmp.replace(output)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise ShopdbError(f"--output {output}: {exc.strerror}") from None
    bad = [s for s in data["signatures"] if not s["ok"]]
    typer.echo(
        f"{output}: certificate of lot {code}, {len(data['parts'])} parts"
        + (" - WARNING: changed since signing" if bad else "")
    )


@audit_app.command("verify")
def audit_verify(
    head: Annotated[
        Path | None,
        typer.Option(
            "--head", help="A head file written by 'shopdb audit export' to check against."
        ),
    ] = None,
    home: HomeOpt = None,
) -> None:
    """Walk the hash chain; name the first broken event; exit 1 if broken.

    Example: shopdb audit verify --head audit-head.json
    """
    from shopdb.services.audit import verify_chain

    expected = None
    if head is not None:
        try:
            expected = json.loads(head.read_text())["head_hash"]
        except (OSError, ValueError, KeyError, TypeError):
            raise ShopdbError(
                f"--head {head}: not a head file written by 'shopdb audit export'"
            ) from None
    shop = _open(home)
    try:
        with shop.read() as session:
            report = verify_chain(session=session, expected_head=expected)
    finally:
        shop.engine.dispose()
    if report.ok:
        typer.echo(f"audit trail intact: {report.events} events, head {report.head_hash}")
        return
    typer.echo(f"audit trail BROKEN at event {report.first_broken_id}: {report.problem}", err=True)
    raise typer.Exit(1)


@audit_app.command("export")
def audit_export(
    output: Annotated[Path, typer.Option("-o", "--output", help="Head file to write (JSON).")],
    home: HomeOpt = None,
) -> None:
    """Write the chain head (last event id and hash) to keep outside the database.

    Example: shopdb audit export -o audit-head.json
    """
    from shopdb.models import utcnow
    from shopdb.services.audit import verify_chain

    shop = _open(home)
    try:
        with shop.read() as session:
            report = verify_chain(session=session)
    finally:
        shop.engine.dispose()
    if not report.ok:
        raise ShopdbError(
            f"the audit trail is broken at event {report.first_broken_id}: {report.problem}; "
            "not exporting a head"
        )
    body = {
        "events": report.events,
        "head_hash": report.head_hash,
        "exported_at": utcnow().isoformat(),
    }
    try:
        output.write_text(json.dumps(body, indent=2) + "\n")
    except OSError as exc:
        raise ShopdbError(f"--output {output}: {exc.strerror}") from None
    typer.echo(f"{output}: head of {report.events} events, {report.head_hash}")


def register(app: typer.Typer) -> None:
    app.add_typer(lot_app, name="lot")
    app.add_typer(audit_app, name="audit")
    app.command("certificate")(certificate)
