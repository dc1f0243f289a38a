"""Import: upload measurement files for a part on a station; the same checks as `shopdb ingest`."""

from __future__ import annotations

import tempfile
from pathlib import Path

import pandas as pd
import streamlit as st

from shopdb.errors import ShopdbError
from shopdb.formats import SUFFIXES
from shopdb.ui import state, view

TYPES = [s.lstrip(".") for s in SUFFIXES]  # every reader's suffixes (shopdb.formats)


def render() -> None:
    state.require_page("import")
    st.header("Import measurements")
    st.caption(
        "Files are read, checked and analysed exactly as `shopdb ingest` does; each file is one "
        "record or nothing, and a file already recorded is recognised by its SHA-256. The upload "
        "limit is 64 MB per file. Interferometers use lasers: follow your local laser-safety rules."
    )
    ch = state.choices()
    c1, c2, c3 = st.columns([2, 2, 1])
    station = c1.selectbox("Station", ch["stations"], key="imp-station")
    serial = c2.selectbox("Part (in process)", ch["measurable_parts"], key="imp-part")
    iteration = c3.number_input(
        "Run (blank: latest)", min_value=0, value=None, step=1, key="imp-run"
    )
    files = st.file_uploader(
        "Measurement files", type=TYPES, accept_multiple_files=True, key="imp-files"
    )
    subtract = st.checkbox(
        "Subtract the reference calibration (else the station's setting)", key="imp-sub"
    )
    if st.button("Import", type="primary", disabled=not files, key="imp-go"):
        st.session_state["import_rows"] = _import(files, station, serial, iteration, subtract)
    if st.session_state.get("import_rows"):
        _results(st.session_state["import_rows"])


def _import(files, station, serial, iteration, subtract) -> list[dict]:
    rows = []
    with tempfile.TemporaryDirectory(prefix="shopdb-import-") as tmp:
        paths = []
        for up in files:
            path = Path(tmp) / Path(up.name).name  # the file's own name, no folders
            path.write_bytes(up.getvalue())
            paths.append(path)
        try:
            report = state.batch_ingest(
                paths=paths,
                part_serial=serial,
                station_name=station,
                run_iteration=None if iteration is None else int(iteration),
                subtract_reference=True if subtract else None,
            )
        except ShopdbError as exc:
            st.error(view.esc(exc))
            return []
    for out in report.outcomes:
        s = out.summary or {}
        rows.append(
            {
                "file": out.file,
                "status": out.status,
                "message": out.message,
                "measurement": out.measurement_id,
                "RMS (nm)": s.get("rms_nm"),
                "PV (nm)": s.get("pv_nm"),
                "valid fraction": s.get("valid_fraction"),
            }
        )
    rows += [{"file": f, "status": "rejected", "message": why} for f, why in report.refused]
    return rows


def _results(rows: list[dict]) -> None:
    table = pd.DataFrame(rows)
    done = (table["status"] == "ingested").sum()
    (st.success if done == len(table) else st.warning)(
        f"{done} of {len(table)} files recorded; "
        f"{(table['status'] == 'duplicate').sum()} already recorded, "
        f"{(table['status'] == 'rejected').sum()} rejected."
    )
    st.dataframe(table.round(3), hide_index=True, width="stretch")
    ids = [int(i) for i in table.get("measurement", pd.Series(dtype=float)).dropna()]
    if ids and st.button(f"Open measurement {ids[-1]}", key="imp-open"):
        state.open_measurement(ids[-1])
