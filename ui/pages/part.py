"""One part's history: convergence run to run, its measurements, what each run removed (and
which lap next), the removal between any two of them and its maps run by run on one colour
scale."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from shopdb.config import local_time
from shopdb.errors import ShopdbError
from shopdb.quantities import period_range
from shopdb.services import plan
from shopdb.surface import image
from shopdb.ui import charts, maps, state, view

STRIP_COLUMNS = 5


def render() -> None:
    state.require_page("part")
    st.header("Part history")
    parts = state.choices()["parts"]
    if not parts:
        st.info("No parts yet.")
        return
    default = st.session_state.get("part_serial")
    serial = st.selectbox(
        "Part serial", parts, index=parts.index(default) if default in parts else 0
    )
    st.session_state["part_serial"] = serial
    h = state.part(serial)
    tz = state.tz()
    st.caption(
        f"{view.esc(h['drawing'])} — {view.esc(h['title'])} · surface form "
        f"{view.esc(h['callout'])} · lot {view.esc(h['lot'] or '—')} · "
        f"status **{h['status'].replace('_', ' ')}**"
    )
    if h["lot"] and st.button(f"Lot {view.esc(h['lot'])} in release", key="to-lot"):
        state.open_lot(h["lot"])
    _convergence(h)
    meas = h["measurements"]
    st.subheader("Measurements")
    if meas.empty:
        st.info("No measurement of this part yet.")
        return
    st.caption("Pick a row to open the measurement.")
    picked = st.dataframe(
        view.table(
            meas,
            {
                "measured_at": None,
                "iteration": None,
                "machine": None,
                "station": None,
                "rms_nm": None,
                "irregularity_nm": None,
                "sag_nm": None,
                "verdict": "verdict",
                "reasons": "why",
            },
            tz=tz,
        ),
        hide_index=True,
        on_select="rerun",
        selection_mode="single-row",
        key=f"meas-{serial}",
    )
    if picked.selection.rows:
        state.open_measurement(int(meas.iloc[picked.selection.rows[0]]["measurement_id"]))
    runs = state.removals(serial)
    _removals(runs, tz)
    _ranking(serial)
    _plan_panel(serial, runs[-1] if runs else {})
    _difference(meas, tz)
    _strip(serial, tz)


def _removals(rows: list[dict], tz: str) -> None:
    """What each run removed and the ratio per PSD band."""
    done = [r for r in rows if r["removal_rms_nm"] is not None]
    if not done:
        return
    st.subheader("What each run removed")
    edges: list = next((r["ratio_bands"] for r in done if r["ratio_bands"]), [])
    names = [f"after / before, {period_range(lo, hi)}" for lo, hi in edges]
    table = pd.DataFrame(
        [
            {
                "Run": r["iteration"],
                "Machine": r["machine"] or "—",
                "Pad": r["pad"] or "—",
                "Started": local_time(r["started_at"], tz),
                "Removal RMS (nm)": round(r["removal_rms_nm"], 1),
                "Depth (nm)": "—" if r["depth_nm"] is None else f"{r['depth_nm']:.0f}",
                "Preston k_p (1/Pa)": "—"
                if r["preston_per_pa"] is None
                else f"{r['preston_per_pa']:.3g}",
                **{
                    n: "—" if x is None else f"{x:.2f}"
                    for n, x in zip(names, r["band_ratio"], strict=False)
                },
            }
            for r in done
        ]
    )
    st.dataframe(table, hide_index=True)
    st.caption(
        "Removal: the map before the run minus the map after it, registered on the aperture, "
        "piston removed. A ratio above 1 in a fine band: the run added ripple there."
    )


def _ranking(serial: str) -> None:
    """Which lap for the next run, on request (a second or so on a large shop)."""
    if st.toggle("Which lap next?", key=f"rank-{serial}"):
        ranked = state.ranking(serial)
        if not ranked:
            st.info("No full-aperture machine has two or more removals on this drawing yet.")
        else:
            st.write(f"Irregularity now: **{ranked[0]['now_irregularity_nm']:.1f} nm**")
            for r in ranked:
                st.write(
                    f"- {view.esc(r['machine'])}: irregularity after one more run "
                    f"**{r['irregularity_nm']:.1f} ± {r['spread_nm']:.1f} nm** "
                    f"(from {r['removals']} of its removals on this drawing, from runs that started near this part's irregularity)"
                )
            st.caption(
                "A prediction from the record: it supports, never replaces, the lead's judgement."
            )


def _plan_panel(serial: str, last: dict) -> None:
    """The next run of a sub-aperture machine: the dwell that removes the part's error with a
    recorded tool influence function (the last run's machine and pad first), and what it
    predicts."""
    tifs = state.tool_influences()
    if not tifs or not st.toggle("Plan the next sub-aperture run", key=f"plan-{serial}"):
        return
    first = next(
        (
            i
            for i, t in enumerate(tifs)
            if t["machine"] == last.get("machine")
            and last.get("pad")
            and t["name"].endswith(last["pad"])
        ),
        0,
    )
    c1, c2 = st.columns(2)
    tif = c1.selectbox(
        "Tool influence function",
        tifs,
        index=first,
        format_func=lambda t: f"{t['machine']} · {t['name']} ({t['kind']})",
        key=f"plan-tif-{serial}",
    )
    spacing = c2.number_input(
        "Machine grid spacing (mm)", 0.2, 5.0, 1.0, 0.1, key=f"plan-spacing-{serial}"
    )
    try:
        p = state.next_run_plan(serial, tif["id"], float(spacing))
    except ShopdbError as exc:
        st.error(view.esc(exc))
        return
    b, a = p["before"], p["predicted"]
    st.write(
        f"Total dwell **{p['total_time_min']:.1f} min** on a {p['spacing_mm']:.2f} mm grid "
        "(the spacing rounded to whole pixels of the map) "
        f"({p['grid_points']} points) · predicted verdict **{p['verdict']}**"
        + (f" ({view.esc(', '.join(p['failed_fields']))})" if p["failed_fields"] else "")
    )
    rows = [("PV (nm)", "pv_nm"), ("RMS (nm)", "rms_nm"), ("Irregularity (nm)", "irregularity_nm")]
    numbers = pd.DataFrame(
        [{"": label, "Now": round(b[k], 2), "Predicted": round(a[k], 2)} for label, k in rows]
        + [
            {
                "": f"RMS {period_range(nb['low_per_mm'], nb['high_per_mm'])} (nm)",
                "Now": round(nb["rms_nm"], 2),
                "Predicted": round(pb["rms_nm"], 2),
            }
            for nb, pb in zip(b["bands"], a["bands"], strict=True)
        ]
    )
    st.dataframe(numbers, hide_index=True)
    m1, m2, m3 = st.columns(3)
    m1.plotly_chart(
        maps.map_2d(p["error_nm"], p["dx_mm"], title="Error to remove (nm)"),
        key=f"plan-error-{serial}",
    )
    m2.plotly_chart(
        maps.map_2d(p["dwell_s"], p["spacing_mm"], title="Dwell (s per grid point)"),
        key=f"plan-dwell-{serial}",
    )
    m3.plotly_chart(
        maps.map_2d(p["predicted_nm"], p["dx_mm"], title="Predicted after the run (nm)"),
        key=f"plan-after-{serial}",
    )
    st.caption(
        "A prediction: it supports the operator; the machine's own limits, the shop's procedure "
        "and its safety rules decide. Dwell by Tikhonov-regularised non-negative least squares."
    )
    who = state.who()
    if (
        who is not None
        and who.role in ("lead", "admin")
        and st.button("Record this plan", key=f"plan-record-{serial}")
    ):
        try:
            kept = state.write(
                plan.record_new_plan,
                blobs=state.shop().blobs,
                serial=serial,
                tif_id=tif["id"],
                spacing_mm=float(spacing),
            )
        except ShopdbError as exc:
            st.error(view.esc(exc))
        else:
            st.success(
                f"Recorded as plan {kept.id}: start the run with "
                f"`shopdb run start {view.esc(serial)} --plan {kept.id}`."
            )


def _convergence(h: dict) -> None:
    conv = h["convergence"]
    c = conv["convergence"]
    col1, col2 = st.columns([3, 2])
    with col1:
        if conv["per_run"].empty:
            st.info("No polishing runs measured yet.")
        else:
            view.chart(
                charts.convergence(
                    conv["per_run"], tolerance=conv["tolerance"], y_title=conv["quantity"].title
                ),
                name=f"convergence-{h['serial']}",
                key="conv",
            )
    with col2:
        if c is None:
            return
        st.metric("status", c.status)
        if c.ratio is not None:
            st.write(f"convergence ratio per run: **{c.ratio:.2f}**, floor {c.floor:.1f} nm")
        if c.runs_remaining is not None:
            lo, hi = c.runs_interval or (None, None)
            rng = (
                f" (5–95 %: {lo:.0f} to {'never' if hi == float('inf') else f'{hi:.0f}'})"
                if lo is not None
                else ""
            )
            st.write(
                f"forecast: **{c.runs_remaining:.0f}** more runs to {conv['tolerance']:.1f} nm{rng}"
            )
        for note in c.notes:
            st.caption(note)


def _difference(meas, tz: str) -> None:
    """Before − after of any two measurements, registered on the aperture."""
    st.subheader("Removal between two measurements")
    if len(meas) < 2:
        st.caption("Two measurements are needed for a difference map.")
        return
    labels = {
        int(r.measurement_id): (
            f"{local_time(r.measured_at, tz)} · "
            + (f"after run {int(r.iteration)}" if r.iteration == r.iteration else "no run")
        )
        for r in meas.itertuples()
    }
    ids = list(labels)
    c1, c2 = st.columns(2)
    before = c1.selectbox("Before", ids, index=len(ids) - 2, format_func=labels.get, key="d-a")
    after = c2.selectbox("After", ids, index=len(ids) - 1, format_func=labels.get, key="d-b")
    if before == after:
        st.info("Choose two different measurements.")
        return
    try:
        d = state.difference(before, after)
    except ShopdbError as exc:
        st.warning(view.esc(exc))
        return
    st.markdown(
        f"Removed (before − after): PV **{d['pv_nm']:.1f} nm**, RMS **{d['rms_nm']:.1f} nm**; "
        f"the later map was moved by {d['shift_rc'][1]:+.2f} px in x and "
        f"{-d['shift_rc'][0]:+.2f} px in y onto the earlier aperture, piston removed."
    )
    left, right = st.columns(2)
    with left:
        st.plotly_chart(
            maps.map_2d(d["map_nm"], d["dx_mm"], title="removed (nm), seen from above"),
            key="diff2d",
        )
    with right:
        if st.toggle("3-D view of the removal", key="diff-3d"):
            st.plotly_chart(
                maps.surface_3d(d["map_nm"], d["dx_mm"], title="removed, 3-D (drag to turn)"),
                key="diff3d",
            )
        else:
            st.caption("Turn on the 3-D view to see the removal as a surface to rotate.")


def _strip(serial: str, tz: str) -> None:
    """The part's map after each run, piston and tilt removed, all on one colour scale."""
    st.subheader("Maps run by run")
    strip = state.part_strip(serial)
    if not strip["maps"]:
        return
    lo, hi = strip["lo"], strip["hi"]
    st.caption(f"Piston and tilt removed; one colour scale for all maps, {lo:.0f} to {hi:.0f} nm.")
    st.image(image.colour_bar(lo, hi), width=420)
    for start in range(0, len(strip["maps"]), STRIP_COLUMNS):
        cols = st.columns(STRIP_COLUMNS)
        for col, item in zip(cols, strip["maps"][start : start + STRIP_COLUMNS], strict=False):
            title = (
                "before polishing"
                if item["iteration"] is None
                else f"after run {item['iteration']}"
            )
            png, _, _ = image.render(item["map_nm"], scale=1, lo=lo, hi=hi)
            col.image(
                png, caption=f"{title} · {local_time(item['measured_at'], tz)}", width="stretch"
            )
