"""Lot release (QA): per-part evidence and verdicts, dispositions, signature, certificate."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from shopdb.config import local_time
from shopdb.errors import ShopdbError
from shopdb.services import release
from shopdb.ui import charts, state, view

DECISIONS = {
    "accept": "accept",
    "accept_deviation": "accept with deviation",
    "rework": "rework",
    "reject": "reject",
}
VERDICT_MARK = {"pass": "✔ pass", "fail": "✘ fail", "blocked": "⚠ blocked"}


ZONE_MARK = {
    "conformance proven": "proven",
    "inside the uncertainty range": "within U",
    "non-conformance proven": "out",
}


def _field(f: dict) -> str:
    """``30.1 ± 2.5 / 31.6 · within U · 88 % likely in``."""
    if f["measured"] is None:
        return f"— / {f['limit']:.1f}"
    text = f"{abs(f['measured']):.1f}"
    if f.get("U") is not None:
        text += f" ± {f['U']:.1f}"
    text += f" / {f['limit']:.1f}"
    if f.get("zone"):
        text += f" · {ZONE_MARK.get(f['zone'], f['zone'])}"
        if f["zone"] == "inside the uncertainty range" and f.get("conformance_probability"):
            text += f" · {f['conformance_probability']:.0%} likely in"
    return text


def _parts_table(ev: dict) -> pd.DataFrame:
    rows = []
    for p in ev["parts"]:
        d = p["disposition"]
        rows.append(
            {
                "part": p["serial"],
                "status": p["part_status"].replace("_", " "),
                "verdict": VERDICT_MARK[p["verdict"]],
                "why": "; ".join(p["reasons"]),
                **{f"{f['label']} ({f['unit']})": _field(f) for f in p["fields"]},
                "measurement": p["measurement_id"],
                "station": p["station"],
                "disposition": (
                    DECISIONS[d["decision"]]
                    + (f" ({d['deviation_number']})" if d["deviation_number"] else "")
                    if d
                    else "—"
                ),
            }
        )
    return pd.DataFrame(rows)


def _lot_choices(show_all: bool) -> list[dict]:
    """The lots to choose from; a lot just signed stays listed so its certificate is at hand."""
    lots = state.lots(show_all)
    chosen = st.session_state.get("lot-choice")
    if chosen and chosen not in {r["lot"] for r in lots}:
        lots = lots + [r for r in state.lots(True) if r["lot"] == chosen]
    return lots


def render() -> None:
    user = state.require_page("release")
    st.header("Lot release")
    show_all = st.toggle("Show signed lots too", value=False, key="lots-all")
    lots = _lot_choices(show_all)
    if not lots:
        st.info("No lots are waiting for release.")
        return
    # a label never changes with the lot's progress (a changed label would lose the selection)
    labels = {r["lot"]: f"{r['lot']} · {r['drawing']}" for r in lots}
    if st.session_state.get("lot-choice") not in labels:
        st.session_state["lot-choice"] = next(iter(labels))
    code = st.selectbox("Lot", list(labels), format_func=labels.get, key="lot-choice")
    ev = state.lot_evidence(code)
    tz = state.tz()
    st.markdown(
        f"**{view.esc(ev['drawing'])}** {view.esc(ev['drawing_title'])} · surface form "
        f"{view.esc(ev['callout'])} · "
        f"clear aperture Ø {ev['clear_aperture_mm']:g} mm · status **{ev['status']}**"
    )
    for sig in ev["signatures"]:
        text = (
            f"Signed **{sig['meaning']}** by {view.esc(sig['printed_name'])} at "
            f"{local_time(sig['signed_at'], tz)}"
        )
        if sig["ok"]:
            st.success(f"{text} · evidence verifies (SHA-256 `{sig['evidence_sha256'][:16]}…`)")
        else:
            st.error(f"{text} · CHANGED SINCE SIGNING: {view.esc(sig['problem'])}")

    st.caption(
        f"Decision rule: {ev['decision_rule_text']}. Each field shows measured ± U (k = 2) / "
        "limit, its zone (ISO 14253-1: proven in, within U, out) and, within U, the chance the "
        "part conforms (JCGM 106). These decisions support, and never replace, the decision rule "
        "agreed with the customer and the shop's procedure."
    )
    view.chart(charts.lot_fields(ev["parts"]), name=f"lot-{code}-fields", key=f"bars-{code}")
    table = _parts_table(ev)
    st.caption("Pick a row to open its measurement or part.")
    picked = st.dataframe(
        table,
        hide_index=True,
        width="stretch",
        on_select="rerun",
        selection_mode="single-row",
        key=f"parts-{code}",
    )
    rows = picked.selection.rows if picked else []
    if rows:
        p = ev["parts"][rows[0]]
        if st.session_state.get(f"parts-picked-{code}") != p["serial"]:
            # a newly picked row sets that part in the disposition form
            st.session_state[f"parts-picked-{code}"] = p["serial"]
            st.session_state[f"dispose-next-{code}"] = p["serial"]
        c1, c2, _ = st.columns([1, 1, 3])
        if p["measurement_id"] and c1.button("Open its measurement", key="lot-open-m"):
            state.open_measurement(int(p["measurement_id"]))
        if c2.button(f"Part history of {view.esc(p['serial'])}", key="lot-open-p"):
            state.open_part(p["serial"])

    if not ev["parts"]:
        st.info("This lot has no parts yet.")
    elif ev["status"] == "open" and user.role == "qa":
        _dispose_form(ev)
        _sign_form(ev)
    elif ev["status"] == "open":
        st.info("Dispositions and signatures are recorded by QA.")
    if ev["status"] == "released":
        _certificate(code)


def _dispose_form(ev: dict) -> None:
    """One form per lot and part: its widgets are keyed by the record they write, so a decision
    or a reason typed for one part never reaches another."""
    st.subheader("Disposition")
    code = ev["lot"]
    undecided = [p["serial"] for p in ev["parts"] if p["disposition"] is None]
    serials = [p["serial"] for p in ev["parts"]]
    part_key = f"dispose-part-{code}"
    nxt = st.session_state.pop(f"dispose-next-{code}", None)
    if nxt in serials:
        st.session_state[part_key] = nxt
    elif st.session_state.get(part_key) not in serials:
        st.session_state[part_key] = undecided[0] if undecided else serials[0]
    proxy = state.who().via == "proxy"
    passing = [
        p["serial"] for p in ev["parts"] if p["disposition"] is None and p["verdict"] == "pass"
    ]
    confirm = (
        st.text_input(
            "Your password (to record decisions)", type="password", key=f"dispose-pw-{code}"
        )
        if proxy
        else None
    )
    if passing and st.button(
        f"Accept the {len(passing)} passing parts without a disposition",
        key=f"accept-passing-{code}",
    ):
        try:
            state.confirm_identity(confirm)
            done, left = state.write(release.accept_passing, code=code)
        except ShopdbError as exc:
            st.error(view.esc(exc))
        else:
            st.toast(f"{len(done)} parts accepted" + (f"; {len(left)} left" if left else ""))
            st.session_state[f"dispose-next-{code}"] = next(
                (s for s in undecided if s not in done), None
            )
            st.rerun()
    serial = st.selectbox("Part", serials, key=part_key)
    part = ev["parts"][serials.index(serial)]
    if part["disposition"]:
        d = part["disposition"]
        st.caption(
            f"{view.esc(serial)} is disposed {DECISIONS[d['decision']]} by "
            f"{view.esc(d['decided_by'])}; a new decision supersedes it."
        )
    keys = {k: f"dispose-{k}-{code}-{serial}" for k in ("decision", "reason", "dev")}
    with st.form(f"dispose-{code}-{serial}"):
        c1, c2 = st.columns(2)
        decision = c1.selectbox(
            "Decision", list(DECISIONS), format_func=DECISIONS.get, key=keys["decision"]
        )
        deviation = c2.text_input("Deviation number (accept with deviation)", key=keys["dev"])
        reason = st.text_input("Reason (needed unless plainly accepted)", key=keys["reason"])
        if st.form_submit_button("Record disposition", key=f"dispose-submit-{code}-{serial}"):
            try:
                state.confirm_identity(confirm)
                state.write(
                    release.dispose,
                    code=code,
                    serial=serial,
                    decision=decision,
                    reason=reason,
                    deviation_number=deviation.strip() or None,
                )
            except ShopdbError as exc:
                st.error(view.esc(exc))
            else:
                st.toast(f"{view.esc(serial)}: {DECISIONS[decision]} recorded")
                rest = [s for s in undecided if s != serial]
                after = [s for s in rest if serials.index(s) > serials.index(serial)]
                st.session_state[f"dispose-next-{code}"] = (after or rest or [serial])[0]
                for k in keys.values():
                    st.session_state.pop(k, None)
                st.rerun()


def _sign_form(ev: dict) -> None:
    st.subheader("Sign")
    undecided = [p["serial"] for p in ev["parts"] if p["disposition"] is None]
    if undecided:
        st.info(f"Dispose every part before signing: {view.esc(', '.join(undecided))} still open.")
        return
    with st.form(f"sign-{ev['lot']}"):
        meaning = st.radio(
            "Meaning",
            ["released", "rejected", "reviewed"],
            horizontal=True,
            key=f"sign-meaning-{ev['lot']}",
        )
        password = st.text_input(
            "Re-enter your password to sign", type="password", key=f"sign-password-{ev['lot']}"
        )
        st.caption(
            "Your signature records your printed name, the server time, its meaning and the "
            "SHA-256 of the evidence above. It supports, not replaces, the shop's quality procedure."
        )
        if st.form_submit_button("Sign lot", key="sign-submit"):
            try:
                sig = state.write(
                    release.sign,
                    code=ev["lot"],
                    password=password,
                    meaning=meaning,
                    allow_self_release=state.shop().settings.allow_self_release,
                )
            except ShopdbError as exc:
                st.error(view.esc(exc))
            else:
                st.toast(f"lot {ev['lot']} signed {sig.meaning}")
                st.rerun()


def _certificate(code: str) -> None:
    st.subheader("Certificate of conformance")
    shop_name = st.text_input("Header", value=state.shop().settings.shop_name, key=f"hdr-{code}")
    pdf, html = state.certificate_files(code, shop_name)
    c1, c2 = st.columns(2)
    c1.download_button("Certificate (PDF)", pdf, f"{code}.pdf", "application/pdf")
    c2.download_button("Certificate (HTML)", html, f"{code}.html", "text/html")
