"""Cached shop handle, cached queries and the signed-in user, shared by every page."""

from __future__ import annotations

import streamlit as st

from shopdb.errors import PermissionDenied
from shopdb.services import certificate, plan, release, removal, signals, users
from shopdb.services.reads import charts as chart_reads
from shopdb.services.reads import drift as drift_reads
from shopdb.services.reads import kpi as kpi_reads
from shopdb.services.reads import pages as page_reads
from shopdb.services.session import Shop, SignedIn, authenticate_user, open_shop

# what each page needs; who may open it follows from the permission table (services.users)
PAGE_ACTIONS = {
    "floor": "view",
    "part": "view",
    "measurement": "view",
    "charts": "view",
    "references": "view",
    "stations": "view",
    "trends": "view",
    "release": "view",
    "import": "ingest",
    "admin": "manage_master_data",
}
PAGE_ROLES = {page: users.PERMISSIONS[action] for page, action in PAGE_ACTIONS.items()}


@st.cache_resource(show_spinner=False)
def shop() -> Shop:
    return open_shop()


def tz() -> str:
    """The shop's time zone (SHOPDB_TIMEZONE)."""
    return shop().settings.timezone


def who() -> SignedIn | None:
    return st.session_state.get("who")


def require_page(page: str) -> SignedIn:
    """Stop the page unless the signed-in user's role may see it."""
    user = who()
    if user is None or user.role not in PAGE_ROLES[page]:
        st.error("This page is not available to your role.")
        st.stop()
    return user


def _read(fn, **kw):
    with shop().read() as session:
        return fn(session=session, **kw)


@st.cache_data(ttl=60, show_spinner=False)
def choices() -> dict:
    return _read(page_reads.choices)


@st.cache_data(ttl=120, show_spinner="Reading the floor…")
def floor() -> dict:
    return _read(page_reads.floor_overview)


@st.cache_data(ttl=60, show_spinner=False)
def part(serial: str) -> dict:
    return _read(page_reads.part_history, serial=serial)


@st.cache_data(ttl=60, show_spinner=False, max_entries=32)
def removals(serial: str) -> list[dict]:
    return _read(removal.part_removals, serial=serial)


@st.cache_data(ttl=60, show_spinner=False, max_entries=32)
def ranking(serial: str) -> list[dict]:
    with shop().read() as session:
        return removal.rank_machines(session=session, blobs=shop().blobs, serial=serial)


@st.cache_data(ttl=120, show_spinner=False)
def machine_removals(drawing: str | None) -> list[dict]:
    return _read(removal.machine_removals, drawing=drawing)


@st.cache_data(ttl=120, show_spinner=False)
def plans_against_runs() -> list[dict]:
    return _read(plan.plans_against_runs)


@st.cache_data(ttl=300, show_spinner=False)
def tool_influences() -> list[dict]:
    return _read(plan.list_tool_influences)


@st.cache_data(ttl=120, show_spinner=False, max_entries=8)
def next_run_plan(serial: str, tif_id: int, spacing_mm: float) -> dict:
    """A plan as plain values for the page: numbers, and the target, dwell and predicted maps."""
    with shop().read() as session:
        out, _ = plan.plan_with_record(
            session=session, blobs=shop().blobs, serial=serial, tif_id=tif_id, spacing_mm=spacing_mm
        )
    p = out.pop("plan")
    return out | {
        "dwell_s": p.dwell_s,
        "predicted_nm": p.predicted_nm,
        "total_time_min": p.total_time_s / 60,
    }


@st.cache_data(ttl=300, show_spinner=False, max_entries=32)
def measurement(measurement_id: int) -> dict:
    with shop().read() as session:
        return page_reads.measurement_detail(
            session=session, blobs=shop().blobs, measurement_id=measurement_id
        )


@st.cache_data(ttl=300, show_spinner=False, max_entries=16)
def difference(before_id: int, after_id: int) -> dict:
    with shop().read() as session:
        return page_reads.difference(
            session=session, blobs=shop().blobs, before_id=before_id, after_id=after_id
        )


@st.cache_data(ttl=300, show_spinner=False, max_entries=8)
def part_strip(serial: str) -> dict:
    with shop().read() as session:
        return page_reads.part_strip(session=session, blobs=shop().blobs, serial=serial)


@st.cache_data(ttl=300, show_spinner=False, max_entries=8)
def x3p(measurement_id: int) -> bytes:
    with shop().read() as session:
        return page_reads.measurement_x3p(
            session=session, blobs=shop().blobs, measurement_id=measurement_id
        )


@st.cache_data(ttl=30, show_spinner=False)
def find_measurements(text: str, drawing: str | None, start, end):
    return _read(page_reads.find_measurements, text=text, drawing=drawing, start=start, end=end)


@st.cache_data(ttl=60, show_spinner="Computing the chart…")
def chart(
    metric: str, drawing: str | None, by: str | None, kind: str, phase_by: str | None, rules: str
):
    """(per-point table, episodes of signals)."""
    return _read(
        signals.chart_and_episodes,
        metric=metric,
        drawing=drawing,
        by=by,
        chart=kind,
        phase_by=phase_by,
        rule_set=rules,
    )


@st.cache_data(ttl=120, show_spinner="Looking for open signals…")
def watched():
    return _read(signals.watched)


@st.cache_data(ttl=300, show_spinner=False)
def chart_quantities(drawing: str | None):
    return _read(chart_reads.chart_quantities, drawing=drawing)


@st.cache_data(ttl=60, show_spinner=False)
def capability(metric: str, drawing: str, usl: float):
    return _read(chart_reads.finished_capability, metric=metric, drawing=drawing, usl=usl)


@st.cache_data(ttl=60, show_spinner=False)
def drift(reference: str, term: str) -> dict:
    return _read(drift_reads.reference_drift, reference=reference, term=term)


@st.cache_data(ttl=60, show_spinner=False)
def impact(reference: str):
    return _read(drift_reads.drift_impact, reference=reference)


@st.cache_data(ttl=60, show_spinner=False)
def station_check(station: str):
    return _read(chart_reads.station_check, station=station)


@st.cache_data(ttl=120, show_spinner="Counting outcomes…")
def kpis(by: str):
    return _read(kpi_reads.kpi_table, by=by)


@st.cache_data(ttl=30, show_spinner=False)
def counts():
    return _read(page_reads.record_counts)


def open_measurement(measurement_id: int) -> None:
    st.session_state["measurement_id"] = int(measurement_id)
    st.switch_page(st.session_state["pages"]["measurement"])


def open_part(serial: str) -> None:
    st.session_state["part_serial"] = serial
    st.switch_page(st.session_state["pages"]["part"])


def open_chart(drawing: str, metric: str, by: str) -> None:
    """The control chart of ``metric`` on ``drawing``, one per ``by``, phases where the pad
    changes."""
    summary, _ = watched()
    row = summary[(summary["drawing"] == drawing) & (summary["metric"] == metric)]
    st.session_state.update(
        {
            "cc-drawing": drawing,
            "cc-metric-name": metric,
            "cc-by": by,
            "cc-phase": bool(row["phases"].any()),
        }
    )
    st.session_state.pop("cc-group", None)  # the chart in most trouble
    st.switch_page(st.session_state["pages"]["charts"])


def open_reference(name: str) -> None:
    st.session_state["ref-choice"] = name
    st.switch_page(st.session_state["pages"]["references"])


def open_lot(code: str) -> None:
    st.session_state["lot-choice"] = code
    st.switch_page(st.session_state["pages"]["release"])


def batch_ingest(**kw):
    """The one batch ingest (services.ingest.ingest_files) as the signed-in user."""
    from shopdb.services.ingest import ingest_files

    with shop().read() as session:
        actor = users.get_user(session=session, username=who().username)
    report = ingest_files(shop=shop(), actor=actor, **kw)
    st.cache_data.clear()
    return report


def confirm_identity(password: str | None) -> None:
    """A session signed in by the proxy header typed no password: a decision (a disposition)
    then asks for it, as a signature always does. Raises PermissionDenied if it is wrong."""
    user = who()
    if user is not None and user.via == "proxy":
        authenticate_user(
            shop(),
            user.username,
            password or "",
            client=f"app:{st.context.ip_address}",
            wrong="the password is wrong; nothing was recorded",
        )


def write(fn, **kw):
    """Run a service as the signed-in user in one transaction; clear cached reads after it.

    A refused password still counts as a failed attempt (that count is committed)."""
    with shop().write() as session:
        actor = users.get_user(session=session, username=who().username)
        try:
            out = fn(session=session, actor=actor, **kw)
        except PermissionDenied:
            session.commit()  # keep a failed password count; nothing else was written
            raise
    st.cache_data.clear()
    return out


@st.cache_data(ttl=30, show_spinner=False)
def lots(include_signed: bool) -> list[dict]:
    return _read(release.lots, include_signed=include_signed)


@st.cache_data(ttl=30, show_spinner="Gathering the lot's evidence…", max_entries=16)
def lot_evidence(code: str) -> dict:
    return _read(release.lot_evidence, code=code)


@st.cache_data(ttl=30, show_spinner=False)
def admin_lists() -> dict:
    return _read(page_reads.admin_lists)


@st.cache_data(ttl=300, show_spinner="Writing the certificate…", max_entries=8)
def certificate_files(code: str, shop_name: str) -> tuple[bytes, str]:
    """(PDF, HTML) of a released lot's certificate."""
    data = _read(certificate.certificate_data, blobs=shop().blobs, code=code, shop_name=shop_name)
    return certificate.render_pdf(data), certificate.render_html(data)
