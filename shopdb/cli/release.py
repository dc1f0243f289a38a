"""Release commands: ``shopdb lot ...``, ``shopdb certificate``, ``shopdb audit verify|export``."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated

import typer

from shopdb.cli.common import (
    AsOpt,
    HomeOpt,
    JsonOpt,
    actor,
    as_actor,
    emit_json,
    field_text,
    opened,
    password_for,
    read,
    table,
    when,
)
from shopdb.errors import ShopdbError

lot_app = typer.Typer(
    help="Lot release: evidence, dispositions, signatures (qa).", no_args_is_help=True
)
audit_app = typer.Typer(help="The tamper-evident audit trail.", no_args_is_help=True)


def _decision(d: dict | None) -> str:
    if not d:
        return ""
    return d["decision"].replace("_", " ") + (
        f" {d['deviation_number']}" if d["deviation_number"] else ""
    )


@lot_app.command("list")
def lot_list(
    all_lots: Annotated[bool, typer.Option("--all", help="Signed lots too.")] = False,
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """Lots awaiting release (open), with how many parts are disposed. Needs no password.

    Example: shopdb lot list --all
    """
    from shopdb.services import release

    rows = read(home, lambda shop, s: release.lots(session=s, include_signed=all_lots))
    if as_json:
        emit_json(rows)
        return
    if not rows:
        typer.echo("no open lots" if not all_lots else "no lots")
        return
    typer.echo(
        table(
            [(r["lot"], r["status"], r["drawing"], r["parts"], r["disposed"]) for r in rows],
            ["lot", "status", "drawing", "parts", "disposed"],
        )
    )


@lot_app.command("show")
def lot_show(
    code: Annotated[str, typer.Argument(help="Lot code.")],
    as_json: JsonOpt = False,
    home: HomeOpt = None,
) -> None:
    """A lot's evidence: per part verdict with every reason, disposition; signatures and
    whether they verify. Needs no password.

    Example: shopdb lot show L-2605
    """
    from shopdb.services import release

    tz, ev = read(
        home, lambda shop, s: (shop.settings.timezone, release.lot_evidence(session=s, code=code))
    )
    if as_json:
        emit_json(ev)
        return
    typer.echo(f"lot {ev['lot']} ({ev['status']}), drawing {ev['drawing']}: {ev['callout']}")
    typer.echo(f"decision rule: {ev['decision_rule_text']}; U expanded with k = 2")
    typer.echo(
        table(
            [
                (
                    p["serial"],
                    p["verdict"],
                    _decision(p["disposition"]),
                    "; ".join(field_text(f) for f in p["fields"]),
                )
                for p in ev["parts"]
            ],
            ["part", "verdict", "disposition", "fields (measured ± U / limit, zone)"],
        )
    )
    for p in ev["parts"]:
        for reason in p["reasons"]:
            typer.echo(f"  {p['serial']}: {reason}")
    for sig in ev["signatures"]:
        state = "verifies" if sig["ok"] else f"DOES NOT VERIFY: {sig['problem']}"
        typer.echo(
            f"signed {sig['meaning']} by {sig['printed_name']} at {when(sig['signed_at'], tz)}: {state}"
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

    Example: shopdb lot dispose L-2640 100-4000 --decision rework --reason "irregularity over B" --as qa
    """
    from shopdb.services import release

    def fn(shop, s, actor):
        d = release.dispose(
            session=s,
            actor=actor,
            code=code,
            serial=serial,
            decision=decision,
            reason=reason,
            deviation_number=deviation,
            measurement_id=measurement,
        )
        return f"{serial}: {decision} (disposition {d.id}, verdict {d.verdict['verdict']})"

    typer.echo(as_actor(home, as_user, fn))


@lot_app.command("accept")
def lot_accept(
    code: Annotated[str, typer.Argument(help="Lot code.")],
    home: HomeOpt = None,
    as_user: AsOpt = None,
) -> None:
    """Accept every part of the lot whose verdict is a pass and that has no disposition yet
    (qa); the others are listed for a decision of their own.

    Example: shopdb lot accept L-2640 --as qa
    """
    from shopdb.services import release

    done, left = as_actor(
        home, as_user, lambda shop, s, a: release.accept_passing(session=s, actor=a, code=code)
    )
    typer.echo(f"{len(done)} parts accepted: {', '.join(done) or '-'}")
    if left:
        typer.echo("still to decide: " + "; ".join(f"{p} ({why})" for p, why in left))


@lot_app.command("sign")
def lot_sign(
    code: Annotated[str, typer.Argument(help="Lot code.")],
    meaning: Annotated[str, typer.Option(help="released, rejected or reviewed.")] = "released",
    home: HomeOpt = None,
    as_user: AsOpt = None,
) -> None:
    """Sign a lot. The password is asked again at the moment of signing ($SHOPDB_PASSWORD in scripts).

    Example: shopdb lot sign L-2640 --meaning released --as qa
    """
    from shopdb.services import release

    with opened(home) as shop:
        user = actor(shop, as_user)
        password = password_for(user.username, prompt="re-enter your password to sign")
        sig = release.sign_lot(shop=shop, actor=user, code=code, password=password, meaning=meaning)
    typer.echo(
        f"lot {code} signed {meaning} by {sig.printed_name} at "
        f"{when(sig.signed_at, shop.settings.timezone)}; evidence SHA-256 {sig.evidence_sha256}"
    )


@lot_app.command("verify")
def lot_verify(
    code: Annotated[str, typer.Argument(help="Lot code.")],
    home: HomeOpt = None,
) -> None:
    """Recompute each signature's evidence hash and check its seal; exit 1 if any no longer
    matches. Needs no password.

    Example: shopdb lot verify L-2605
    """
    from shopdb.services import release

    sigs = read(home, lambda shop, s: release.verify_lot(session=s, code=code))
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
) -> None:
    """Certificate of conformance of a released lot, as PDF or HTML (by the file's suffix).
    Needs no password.

    Example: shopdb certificate L-2605 -o L-2605.pdf --shop-name "Kestrel Ridge Optics"
    """
    from shopdb.services import certificate as cert

    suffix = output.suffix.lower()
    if suffix not in (".pdf", ".html", ".htm"):
        raise ShopdbError(f"--output {output}: the file must end in .pdf or .html")

    def fn(shop, s):
        data = cert.certificate_data(
            session=s,
            blobs=shop.blobs,
            code=code,
            shop_name=shop_name or shop.settings.shop_name,
        )
        return data, (
            cert.render_pdf(data) if suffix == ".pdf" else cert.render_html(data).encode()
        )

    data, body = read(home, fn)
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
    report = read(home, lambda shop, s: verify_chain(session=s, expected_head=expected))
    if report.ok:
        typer.echo(f"audit trail intact: {report.events} events, head {report.head_hash}")
        return
    typer.echo(f"audit trail BROKEN at event {report.first_broken_id}: {report.problem}", err=True)
    raise typer.Exit(1)


@audit_app.command("export")
def audit_export(
    output: Annotated[Path, typer.Option("-o", "--output", help="Head file to write (JSON).")],
    events: Annotated[
        Path | None,
        typer.Option(
            "--events", help="Also write every event, for review: .csv or .json by the suffix."
        ),
    ] = None,
    home: HomeOpt = None,
) -> None:
    """Write the chain head (last event id and hash) to keep outside the database, and with
    --events the audit trail itself.

    Example: shopdb audit export -o audit-head.json --events audit-events.csv
    """
    import csv
    import io
    from datetime import UTC, datetime

    from shopdb.services import audit

    if events is not None and events.suffix.lower() not in (".csv", ".json"):
        raise ShopdbError(f"--events {events}: name a .csv or a .json file")

    def load(shop, s):
        return audit.verify_chain(session=s), audit.events(session=s) if events else []

    report, rows = read(home, load)
    if not report.ok:
        raise ShopdbError(
            f"the audit trail is broken at event {report.first_broken_id}: {report.problem}; "
            "not exporting a head"
        )
    body = {
        "events": report.events,
        "head_hash": report.head_hash,
        "exported_at": datetime.now(UTC).isoformat(),
    }
    files = {output: json.dumps(body, indent=2) + "\n"}
    if events is not None:
        if events.suffix.lower() == ".json":
            files[events] = json.dumps(rows, indent=1, ensure_ascii=False) + "\n"
        else:
            buf = io.StringIO()
            writer = csv.DictWriter(buf, fieldnames=audit.EVENT_COLUMNS, lineterminator="\n")
            writer.writeheader()
            writer.writerows(rows)
            files[events] = buf.getvalue()
    write_files(files)
    typer.echo(f"{output}: head of {report.events} events, {report.head_hash}")
    if events is not None:
        typer.echo(f"{events}: {len(rows)} events")


def write_files(files: dict[Path, str]) -> None:
    """Write every file to a temporary name first, then rename them into place: a failure
    leaves no file behind (and the earlier ones as they were)."""
    staged: list[tuple[Path, Path]] = []
    try:
        for path, text in files.items():
            tmp = path.with_name(f".{path.name}.part")
            staged.append((tmp, path))
            tmp.write_text(text, encoding="utf-8")
        for tmp, path in staged:
            tmp.replace(path)
    except OSError as exc:
        for tmp, _ in staged:
            tmp.unlink(missing_ok=True)
        where = exc.filename or (staged[-1][1] if staged else "")
        raise ShopdbError(f"{where}: {exc.strerror or exc}") from None


def register(app: typer.Typer) -> None:
    app.add_typer(lot_app, name="lot")
    app.add_typer(audit_app, name="audit")
    app.command("certificate")(certificate)
