"""Control charts: the watched chart with the most open signals first; limits, zones and
run-parameter changes on the chart; signals grouped into episodes, each open until a lead records
its assignable cause and the action taken."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from shopdb.config import local_time
from shopdb.errors import ShopdbError
from shopdb.services import signals, users
from shopdb.surface.zernike import name as zernike_name
from shopdb.ui import charts, state, view

GROUPINGS = {"machine": "machine", "station": "station", "drawing": "drawing", "nothing": None}
KINDS = {"imr": "individuals", "ewma": "EWMA", "cusum": "CUSUM"}
RULES = {
    "nelson": "Nelson's eight tests",
    "western-electric": "Western Electric",
    "limits": "3-sigma limits only",
}


def _defaults(drawings: list[str]) -> None:
    """On first opening: the watched chart with the most open signals, phases when it has them."""
    if "cc-drawing" in st.session_state or not drawings:
        return
    summary, _ = state.watched()
    top = summary.iloc[0] if not summary.empty else None
    if top is not None and top["signals"] > 0:
        st.session_state["cc-drawing"] = top["drawing"]
        st.session_state["cc-metric-name"] = top["metric"]
        st.session_state["cc-phase"] = bool(top["phases"])
    else:
        st.session_state["cc-drawing"] = drawings[0]
        st.session_state["cc-phase"] = bool(
            not summary.empty and summary[summary["drawing"] == drawings[0]]["phases"].any()
        )


def render() -> None:
    user = state.require_page("charts")
    st.header("Control charts")
    drawings = state.choices()["drawings"]
    _defaults(drawings)
    c1, c2, c3, c4 = st.columns(4)
    # one drawing by default: parts of different sizes do not belong on one chart
    drawing = c1.selectbox("Drawing", [*drawings, "all"], key="cc-drawing")
    options = state.chart_quantities(None if drawing == "all" else drawing)
    names = [q.name for q in options]
    titles = {q.name: q.title for q in options}
    wanted = st.session_state.pop("cc-metric-name", None)
    if wanted in names:
        st.session_state["cc-metric"] = wanted
    elif st.session_state.get("cc-metric") not in names:
        st.session_state["cc-metric"] = names[0]
    metric = c2.selectbox("Quantity", names, format_func=titles.get, key="cc-metric")
    by = c3.selectbox("One chart per", list(GROUPINGS), key="cc-by")
    kind = c4.selectbox("Chart", list(KINDS), format_func=KINDS.get, key="cc-kind")
    c5, c6 = st.columns([1, 2])
    phase = c5.toggle("New limits after each pad change (phases)", key="cc-phase")
    rules = c6.radio("Rules", list(RULES), format_func=RULES.get, horizontal=True, key="cc-rules")
    label = titles[metric]
    grouping = GROUPINGS[by]
    chosen_drawing = None if drawing == "all" else drawing
    t, episodes = state.chart(
        metric, chosen_drawing, grouping, kind, "pad" if phase else None, rules
    )
    if t.empty:
        st.info("Not enough data for this chart.")
        return
    groups = list(dict.fromkeys(t["group"]))
    opened = {
        g: episodes[(episodes["group"] == g) & (episodes["status"] == "open")]
        if not episodes.empty
        else episodes
        for g in groups
    }
    st.markdown(
        f"**{len(episodes)}** episodes of signals on these charts, "
        f"**{sum(len(e) for e in opened.values())}** open (signals no more than 3 quiet points "
        "apart form one episode)."
    )
    if len(groups) > 1:  # one chart at a time, the one in most trouble first
        busiest = max(
            groups, key=lambda g: int(opened[g]["signals"].sum()) if len(opened[g]) else 0
        )
        if st.session_state.get("cc-group") not in groups:
            st.session_state["cc-group"] = busiest
        # the labels are the groups alone: a label that changed with the open count would lose
        # the selection when a response is recorded
        group = st.radio(f"One chart per {by}", groups, horizontal=True, key="cc-group")
        busy = [f"{view.esc(g)} {len(opened[g])}" for g in groups if len(opened[g])]
        if busy:
            st.caption("Open episodes: " + ", ".join(busy))
    else:
        group = groups[0]
    g = t[t["group"] == group]
    eps = episodes[episodes["group"] == group] if not episodes.empty else episodes
    n_open = len(opened[group])
    title = f"{group}: {label}" + (f" — {n_open} open episodes" if n_open else "")
    ev = view.chart(
        charts.control_chart(g, title=title, y_title=label, episodes=eps),
        name=f"control-{drawing}-{metric}-{group}".replace(":", "-").replace(" ", "-"),
        key=f"cc-{group}",
        on_select=True,
    )
    sel = (ev.selection or {}).get("point") if ev else None
    if sel:
        state.open_measurement(int(sel[0]["measurement_id"]))
    if not eps.empty:
        _episodes(user, eps, metric=metric, drawing=chosen_drawing, by=grouping, group=group)
    st.caption(
        "Click a point to open its measurement. Limits come from each chart's first 20 points "
        "(or each phase's). For PV, RMS and band RMS, which cannot be negative, a lower limit "
        "below zero is set to zero (Montgomery, Introduction to Statistical Quality Control, "
        "§6.2); purple lines mark a change of pad or other named run parameter."
    )
    _capability(metric, label, drawing)
    _machines(chosen_drawing)


def _machines(drawing: str | None) -> None:
    """Each machine's removal over time: Preston's coefficient as a control chart per pad, the
    mean shape of what it removes, and its planned runs against what they achieved."""
    if not st.toggle("Machines: what they remove", key="cc-machines"):
        return
    planned = state.plans_against_runs()
    for entry in state.machine_removals(drawing):
        st.subheader(entry["machine"])
        shape = ", ".join(
            f"{zernike_name(n, m)} {c:+.1f} nm" for n, m, c in entry["mean_shape_nm"][:3]
        )
        st.write(
            f"{len(entry['runs'])} runs · mean removal RMS **{entry['mean_removal_rms_nm']:.1f} nm**"
            f" · mean shape: {shape or '—'}"
        )
        if entry["preston_chart"]:
            view.chart(
                charts.preston(
                    entry["preston_chart"], title=f"{entry['machine']}: Preston's coefficient"
                ),
                name=f"preston-{entry['machine']}".replace(" ", "-"),
                key=f"preston-{entry['machine']}",
            )
        mine = [r for r in planned if r["machine"] == entry["machine"]]
        if mine:
            view.chart(
                charts.planned_against_achieved(
                    mine, title=f"{entry['machine']}: planned runs, planned against achieved"
                ),
                name=f"plans-{entry['machine']}".replace(" ", "-"),
                key=f"plans-{entry['machine']}",
            )
    st.caption(
        "Preston's coefficient k_p = depth / (pressure × speed × time) of each run whose "
        "parameters record them (Preston 1927); limits per pad from its moving ranges. Planned "
        "runs: the RMS the recorded plan predicted and the RMS the run's measurement shows."
    )


def _episodes(user, eps: pd.DataFrame, *, metric, drawing, by, group) -> None:
    opened = eps[eps["status"] == "open"]
    with st.expander(
        f"{group}: {len(eps)} episodes, {len(opened)} open", expanded=not opened.empty
    ):
        st.dataframe(
            view.table(
                eps,
                {
                    "status": "episode",
                    "first": "from",
                    "last": "to",
                    "points": "points",
                    "signals": "signals",
                    "rules": "rules fired",
                    "what": "latest signal",
                    "cause": "assignable cause",
                    "action": "action taken",
                    "recorded_by": None,
                    "recorded_at": None,
                },
                tz=state.tz(),
            ),
            hide_index=True,
        )
        if opened.empty or user.role not in users.PERMISSIONS["respond_to_signals"]:
            return
        tz = state.tz()
        # an episode is named by its first point, which new data never moves
        choices = {
            int(r.first_measurement_id): f"from {local_time(r.first, tz)}"
            for r in opened.iloc[::-1].itertuples()  # the newest first
        }
        chart_key = f"{metric}-{drawing}-{by}-{group}"
        with st.form(f"respond-{chart_key}", clear_on_submit=True):
            st.markdown("**Record the out-of-control action**")
            first = st.selectbox(
                "Episode", list(choices), format_func=choices.get, key=f"respond-ep-{chart_key}"
            )
            cause = st.text_input("Assignable cause found", placeholder="e.g. pad glazed")
            action = st.text_input("Action taken", placeholder="e.g. pad dressed, part re-run")
            if st.form_submit_button("Record"):
                row = opened[opened["first_measurement_id"] == first].iloc[0]
                try:
                    state.write(
                        signals.record_response,
                        metric=metric,
                        drawing=drawing,
                        by=by,
                        group=str(group),
                        first_measurement_id=int(first),
                        last_measurement_id=int(row["last_measurement_id"]),
                        cause=cause,
                        action=action,
                    )
                except ShopdbError as exc:
                    st.error(view.esc(exc))
                else:
                    st.toast(f"{view.esc(group)}: response recorded")
                    st.rerun()


def _capability(metric: str, label: str, drawing: str) -> None:
    with st.expander(f"Capability of {label}"):
        if drawing == "all":
            st.info("Capability is computed for one drawing: choose it above.")
            return
        usl = st.number_input(
            "Upper specification limit (same unit)", min_value=0.0, value=None, key="cc-usl"
        )
        if not usl:
            return
        try:
            c = state.capability(metric, drawing, usl)
        except ShopdbError as exc:
            st.warning(view.esc(exc))
            return
        st.write(
            f"Cpu {c.cpk:.2f} (95 % CI {c.cpk_ci[0]:.2f}–{c.cpk_ci[1]:.2f}), Ppu {c.ppk:.2f}, "
            f"percentile Ppu {c.percentile_ppk:.2f} — {c.method_note}; n = {c.n} parts "
            "(last value each)"
        )
