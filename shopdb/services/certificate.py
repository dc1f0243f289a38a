"""Certificate of conformance of a released lot, as HTML and as PDF (fpdf2).

Both show the same data: shop header, lot, drawing and callout, one row per part (measured vs
limit per field, verdict, disposition), a small map and the Zernike/PSD summary of each part,
the reference calibrations used, the signature block and the evidence hash, and a banner when
the signature no longer verifies.
"""

from __future__ import annotations

import html
import io

import numpy as np
from fpdf import FPDF
from sqlmodel import Session, select

from shopdb import models as m
from shopdb import quantities
from shopdb.blobs import BlobStore
from shopdb.errors import ShopdbError
from shopdb.services.release import lot_evidence
from shopdb.surface import image, zernike

CAUTION = (
    "This certificate is produced by shopdb from the recorded measurements. Its verdicts support, "
    "and do not replace, the customer's drawing, the decision rule agreed with the customer and "
    "the shop's quality procedure."
)
UNCERTAINTY_NOTE = (
    "U: expanded uncertainty of measurement, coverage factor k = 2 (JCGM 100:2008), from the "
    "station's check-standard repeatability, the reference calibration, its predicted drift and "
    "the latest gage study. Zones after ISO 14253-1:2017: proven = conformance proven, "
    "in U = inside the uncertainty range, out = non-conformance proven."
)
ZONES = {
    "conformance proven": "proven",
    "inside the uncertainty range": "in U",
    "non-conformance proven": "out",
}
SUMMARY_TERMS = ((2, 0), (2, -2), (2, 2), (3, -1), (3, 1), (4, 0))


def certificate_data(*, session: Session, blobs: BlobStore, code: str, shop_name: str) -> dict:
    """The lot's signed evidence plus, per part, a thumbnail PNG and the Zernike/PSD summary."""
    ev = lot_evidence(session=session, code=code)
    if ev["status"] != "released":
        raise ShopdbError(f"lot {code} is {ev['status']}: a certificate needs a released lot")
    for part in ev["parts"]:
        part["thumbnail"] = None
        part["zernike"] = []
        part["bands"] = []
        if part["result_id"] is None:
            continue
        me = session.get(m.Measurement, part["measurement_id"])
        res = session.get(m.SurfaceResult, part["result_id"])
        z = blobs.get(me.blob_key).astype(np.float64)
        step = max(1, max(z.shape) // 160)
        part["thumbnail"] = image.render(z[::step, ::step], scale=1)[0]
        coefs = {
            (t.n, t.m): t.coef_nm
            for t in session.exec(select(m.ZernikeTerm).where(m.ZernikeTerm.result_id == res.id))
        }
        part["zernike"] = [
            (zernike.name(n, k), coefs[(n, k)]) for n, k in SUMMARY_TERMS if (n, k) in coefs
        ]
        part["bands"] = res.psd_bands
        part["measured_at"] = f"{me.measured_at:%Y-%m-%d %H:%M} UTC"
    for sig in ev["signatures"]:
        sig["signed_at"] = sig["signed_at"][:19].replace("T", " ") + " UTC"
    ev["shop_name"] = shop_name
    ev["calibrations"] = sorted(
        {
            (c["reference"], c["id"], c["calibrated_at"][:10], c["valid_until"][:10])
            for c in (p["calibration"] for p in ev["parts"])
            if c
        }
    )
    return ev


def _band_label(b: dict) -> str:
    return f"periods {quantities.period_range(b['low_per_mm'], b.get('high_per_mm'))}"


def _fields_text(part: dict) -> list[tuple[str, str, str, str]]:
    rows = []
    for f in part["fields"]:
        q = quantities.for_field(f["field"])
        measured = "-" if f["measured"] is None else f"{abs(f['measured']):.1f}"
        u = f" ± {f['U']:.1f}" if f.get("U") is not None else ""
        zone = f", {ZONES.get(f['zone'], f['zone'])}" if f.get("zone") else ""
        rows.append(
            (
                q.certificate_label or q.label,
                f"{measured}{u} {q.unit}",
                f"{f['limit']:.1f} {q.unit}",
                ("pass" if f["passed"] else "FAIL") + zone,
            )
        )
    return rows


def _decision(part: dict) -> str:
    d = part["disposition"]
    if d is None:
        return "-"
    text = d["decision"].replace("_", " ")
    return f"{text} ({d['deviation_number']})" if d["deviation_number"] else text


def _problems(data: dict) -> list[str]:
    return [f"signature {s['id']}: {s['problem']}" for s in data["signatures"] if not s["ok"]]


# --- HTML ---------------------------------------------------------------------------------


def render_html(data: dict) -> str:
    import base64

    e = html.escape
    out = [
        "<!doctype html><html><head><meta charset='utf-8'>",
        f"<title>Certificate of conformance {e(data['lot'])}</title>",
        "<style>body{font-family:sans-serif;max-width:60em;margin:2em auto;color:#222}"
        "table{border-collapse:collapse;margin:.5em 0}td,th{border:1px solid #bbb;padding:.2em .5em;"
        "text-align:left}.banner{background:#b00020;color:#fff;padding:.6em;font-weight:bold}"
        ".part{display:flex;gap:1em;margin:1em 0}.hash{font-family:monospace}</style></head><body>",
        f"<h1>{e(data['shop_name'])}</h1><h2>Certificate of conformance — lot {e(data['lot'])}</h2>",
    ]
    for p in _problems(data):
        out.append(f"<p class='banner'>CHANGED SINCE SIGNING — {e(p)}</p>")
    out.append(
        f"<p>Drawing {e(data['drawing'])} {e(data['drawing_title'])}<br>Surface form: "
        f"<b>{e(data['callout'])}</b> (test wavelength {data['wavelength_nm']:g} nm, clear "
        f"aperture Ø {data['clear_aperture_mm']:g} mm)<br>Decision rule: "
        f"{e(data['decision_rule_text'])}<br><small>{e(UNCERTAINTY_NOTE)}</small></p>"
    )
    out.append(
        "<table><tr><th>part</th><th>field</th><th>measured ± U</th><th>limit</th><th>result</th>"
        "<th>verdict</th><th>disposition</th></tr>"
    )
    for part in data["parts"]:
        rows = _fields_text(part) or [("-", "-", "-", "-")]
        for i, (f, meas, lim, res) in enumerate(rows):
            head = f"<td rowspan={len(rows)}>{e(part['serial'])}</td>" if i == 0 else ""
            tail = (
                f"<td rowspan={len(rows)}>{e(part['verdict'])}</td>"
                f"<td rowspan={len(rows)}>{e(_decision(part))}</td>"
                if i == 0
                else ""
            )
            out.append(
                f"<tr>{head}<td>{e(f)}</td><td>{meas}</td><td>{lim}</td><td>{res}</td>{tail}</tr>"
            )
    out.append("</table><h3>Parts</h3>")
    for part in data["parts"]:
        img = (
            f"<img width=120 height=120 alt='map of {e(part['serial'])}' src='data:image/png;base64,"
            f"{base64.b64encode(part['thumbnail']).decode()}'>"
            if part["thumbnail"]
            else ""
        )
        zern = ", ".join(f"{e(n)} {c:+.1f} nm" for n, c in part["zernike"])
        bands = ", ".join(f"{_band_label(b)}: {b['rms_nm']:.2f} nm" for b in part["bands"])
        reasons = "".join(f"<li>{e(r)}</li>" for r in part["blocked"])
        reason = f"QA: {e(part['disposition']['reason'])}" if part["disposition"] else ""
        out.append(
            f"<div class='part'>{img}<div><b>{e(part['serial'])}</b> measurement "
            f"{part['measurement_id']} on {e(str(part['station']))}, {e(str(part['measured_at']))}"
            f"<br>Zernike: {zern}<br>PSD bands: {bands}<ul>{reasons}</ul>{reason}</div></div>"
        )
    out.append("<h3>Reference calibrations used</h3><ul>")
    for ref, cid, start, end in data["calibrations"]:
        out.append(f"<li>{e(ref)}: calibration {cid}, {start}, valid until {end}</li>")
    out.append(
        "</ul><h3>Signatures</h3><table><tr><th>name</th><th>meaning</th><th>time (UTC)</th>"
        "<th>evidence SHA-256</th><th>verifies</th></tr>"
    )
    for s in data["signatures"]:
        out.append(
            f"<tr><td>{e(s['printed_name'])}</td><td>{e(s['meaning'])}</td><td>{e(s['signed_at'])}"
            f"</td><td class='hash'>{s['evidence_sha256']}</td><td>{'yes' if s['ok'] else 'NO'}"
            "</td></tr>"
        )
    out.append(f"</table><p><small>{e(CAUTION)}</small></p></body></html>")
    return "".join(out)


# --- PDF ----------------------------------------------------------------------------------

_LATIN1 = str.maketrans({"λ": "lambda ", "–": "-", "—": "-", "≤": "<=", "≥": ">=", "’": "'"})


def _t(text: object) -> str:
    """Text for the PDF core fonts (Latin-1)."""
    return str(text).translate(_LATIN1).encode("latin-1", "replace").decode("latin-1")


def render_pdf(data: dict) -> bytes:
    pdf = FPDF(format="A4")
    pdf.set_auto_page_break(True, margin=15)
    pdf.set_title(_t(f"Certificate of conformance {data['lot']}"))
    pdf.add_page()
    pdf.set_font("Helvetica", "B", 15)
    pdf.cell(0, 8, _t(data["shop_name"]), new_x="LMARGIN", new_y="NEXT")
    pdf.set_font("Helvetica", "B", 12)
    pdf.cell(
        0, 7, _t(f"Certificate of conformance - lot {data['lot']}"), new_x="LMARGIN", new_y="NEXT"
    )
    for p in _problems(data):
        pdf.set_fill_color(176, 0, 32)
        pdf.set_text_color(255, 255, 255)
        pdf.multi_cell(
            0, 6, _t(f"CHANGED SINCE SIGNING - {p}"), fill=True, new_x="LMARGIN", new_y="NEXT"
        )
        pdf.set_text_color(0, 0, 0)
    pdf.set_font("Helvetica", "", 9)
    pdf.multi_cell(
        0,
        5,
        _t(
            f"Drawing {data['drawing']} {data['drawing_title']}\nSurface form: {data['callout']} "
            f"(test wavelength {data['wavelength_nm']:g} nm, clear aperture Ø "
            f"{data['clear_aperture_mm']:g} mm)\nDecision rule: {data['decision_rule_text']}\n"
            f"{UNCERTAINTY_NOTE}"
        ),
        new_x="LMARGIN",
        new_y="NEXT",
    )
    pdf.ln(2)
    widths = (22, 36, 30, 22, 38, 14, 28)
    with pdf.table(col_widths=widths, text_align="LEFT", first_row_as_headings=True) as table:
        table.row(["part", "field", "measured ± U", "limit", "result", "verdict", "disposition"])
        for part in data["parts"]:
            rows = _fields_text(part) or [("-", "-", "-", "-")]
            for i, fields in enumerate(rows):
                lead = [part["serial"]] if i == 0 else [""]
                tail = [part["verdict"], _decision(part)] if i == 0 else ["", ""]
                table.row([_t(v) for v in (*lead, *fields, *tail)])
    pdf.ln(3)
    pdf.set_font("Helvetica", "B", 10)
    pdf.cell(0, 6, "Parts", new_x="LMARGIN", new_y="NEXT")
    pdf.set_font("Helvetica", "", 8)
    for part in data["parts"]:
        if pdf.will_page_break(32):
            pdf.add_page()
        y = pdf.get_y()
        if part["thumbnail"]:
            pdf.image(io.BytesIO(part["thumbnail"]), x=pdf.l_margin, y=y, w=28, h=28)
        pdf.set_xy(pdf.l_margin + 32, y)
        zern = ", ".join(f"{n} {c:+.1f} nm" for n, c in part["zernike"])
        bands = ", ".join(f"{_band_label(b)}: {b['rms_nm']:.2f} nm" for b in part["bands"])
        lines = [
            f"{part['serial']}: measurement {part['measurement_id']} on {part['station']}, "
            f"{part['measured_at']}",
            f"Zernike: {zern}",
            f"PSD bands: {bands}",
            *part["blocked"],
            f"QA: {part['disposition']['reason']}" if part["disposition"] else "",
        ]
        pdf.multi_cell(0, 4, _t("\n".join(x for x in lines if x)), new_x="LMARGIN", new_y="NEXT")
        pdf.set_y(max(pdf.get_y(), y + 30))
    pdf.set_font("Helvetica", "B", 10)
    pdf.cell(0, 6, "Reference calibrations used", new_x="LMARGIN", new_y="NEXT")
    pdf.set_font("Helvetica", "", 8)
    for ref, cid, start, end in data["calibrations"]:
        pdf.cell(
            0,
            4,
            _t(f"{ref}: calibration {cid}, {start}, valid until {end}"),
            new_x="LMARGIN",
            new_y="NEXT",
        )
    pdf.ln(2)
    pdf.set_font("Helvetica", "B", 10)
    pdf.cell(0, 6, "Signatures", new_x="LMARGIN", new_y="NEXT")
    pdf.set_font("Helvetica", "", 8)
    for s in data["signatures"]:
        pdf.multi_cell(
            0,
            4,
            _t(
                f"{s['printed_name']} - {s['meaning']} - {s['signed_at']} - "
                f"{'verifies' if s['ok'] else 'DOES NOT VERIFY'}\n"
                f"evidence SHA-256 {s['evidence_sha256']}"
            ),
            new_x="LMARGIN",
            new_y="NEXT",
        )
    pdf.ln(2)
    pdf.set_font("Helvetica", "I", 7)
    pdf.multi_cell(0, 4, _t(CAUTION), new_x="LMARGIN", new_y="NEXT")
    return bytes(pdf.output())
