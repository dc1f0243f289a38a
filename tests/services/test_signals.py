"""Control-chart signals as a lead works them: consecutive signals form one episode, each open
until someone with the right records its assignable cause and the action taken (write-once,
audited); the floor counts open episodes; run-parameter changes are labelled. Both backends.

The rules are Nelson's (J. Qual. Technol. 16(4), 1984): a shift of 20 sigma fires test 1 (beyond
3 sigma) at every shifted point. Grouping the points of one cause into one episode, and recording
its cause and action once, is common practice in out-of-control action plans (Montgomery,
Introduction to Statistical Quality Control, §5.3).
"""

from __future__ import annotations

from datetime import timedelta

import pytest
import sqlalchemy as sa

from shopdb import models as m
from shopdb.errors import PermissionDenied, ShopdbError
from shopdb.seed_demo.factories import disk_map
from shopdb.services import masterdata as md
from shopdb.services import signals
from shopdb.services.users import add_user
from tests.services.test_verdict import DAY, LAM, _checks, _measure, _shop

# 20 points in control, a shift for 5, 4 quiet points, one more high point: two episodes
LEVELS = [10.0] * 20 + [14.0] * 5 + [10.0] * 4 + [14.0]


@pytest.fixture
def charted(shop, admin, tmp_path):
    _shop(shop, admin)
    _checks(shop, admin, tmp_path)
    with shop.write() as s:
        d = md.add_drawing(
            session=s,
            actor=admin,
            number="W-1",
            revision="A",
            surface_form_callout="3/5(2); λ = 632.8 nm",
            test_wavelength_nm=LAM,
            clear_aperture_mm=90.0,
        )
        for i in range(len(LEVELS)):
            md.add_part(session=s, actor=admin, serial=f"P-{i:02d}", drawing_id=d.id)
    ids = []
    for i, level in enumerate(LEVELS):
        when = DAY + timedelta(hours=i)
        with shop.write() as s:
            md.start_run(
                session=s,
                actor=admin,
                part_serial=f"P-{i:02d}",
                machine_name="Lap 1",
                started_at=when - timedelta(minutes=30),
                params={"pad": "A" if i < 25 else "B", "dwell_min": 10.0 + i},
            )
        wobble = 0.05 * ((i % 4) - 1.5) / 1.5  # a steady spread, no chance false alarm
        # a trace of trefoil makes each file its own (the same bytes twice are one record)
        surface = disk_map({(2, 2): level + wobble, (3, 3): 0.01 * (i + 1)}, npix=64, noise_nm=0.0)
        ids.append(_measure(shop, admin, tmp_path, f"P-{i:02d}", surface, when).measurement_id)
    return ids


def test_signals_group_into_episodes_and_a_response_closes_one(shop, admin, charted):
    with shop.read() as s:
        t, eps = signals.chart_and_episodes(session=s, metric="rms_nm", drawing="W-1", by="machine")
        summary, open_eps = signals.watched(session=s, since=DAY)
    assert list(eps["group"]) == ["Lap 1", "Lap 1"]
    first, second = eps.iloc[0], eps.iloc[1]
    assert first["first_measurement_id"] == charted[20]
    assert first["last_measurement_id"] == charted[24]
    assert first["signals"] == 5 and "N1" in first["rules"]
    assert first["kind"] == "deterioration"
    assert second["first_measurement_id"] == second["last_measurement_id"] == charted[29]
    assert set(eps["status"]) == {"open"}
    # the pad change is labelled at the first point on the new pad; the dwell is not
    assert t["change"].tolist()[25] == "pad A → B"
    assert sum(bool(c) for c in t["change"]) == 1
    row = summary[(summary["drawing"] == "W-1") & (summary["metric"] == "rms_nm")].iloc[0]
    assert row["open"] == 2 and row["signals"] == first["signals"] + second["signals"]
    assert summary["signals"].is_monotonic_decreasing
    assert len(open_eps[open_eps["metric"] == "rms_nm"]) == 2

    with shop.write() as s:
        operator = add_user(
            session=s,
            actor=admin,
            username="op",
            display_name="Operator",
            role="operator",
            password="operator-password",
        )
    episode = {
        "metric": "rms_nm",
        "drawing": "W-1",
        "by": "machine",
        "group": "Lap 1",
        "first_measurement_id": int(first["first_measurement_id"]),
        "last_measurement_id": int(first["last_measurement_id"]),
    }
    with pytest.raises(PermissionDenied), shop.write() as s:
        signals.record_response(
            session=s, actor=operator, cause="pad glazed", action="dressed", **episode
        )
    with pytest.raises(ShopdbError, match="cause"), shop.write() as s:
        signals.record_response(session=s, actor=admin, cause=" ", action="dressed", **episode)
    with shop.write() as s:
        response = signals.record_response(
            session=s,
            actor=admin,
            cause="pad glazed",
            action="pad dressed, parts re-run",
            **episode,
        )
    with shop.read() as s:
        _, eps = signals.chart_and_episodes(session=s, metric="rms_nm", drawing="W-1", by="machine")
        summary, _ = signals.watched(session=s, since=DAY)
        events = s.exec(
            sa.select(m.AuditEvent.action).where(
                m.AuditEvent.table_name == "signal_response",
                m.AuditEvent.record_id == str(response.id),
            )
        ).all()
    assert list(eps["status"]) == ["handled", "open"]
    assert eps.iloc[0]["cause"] == "pad glazed" and eps.iloc[0]["recorded_by"] == "Test Admin"
    row = summary[(summary["drawing"] == "W-1") & (summary["metric"] == "rms_nm")].iloc[0]
    assert row["open"] == 1
    assert events  # the response is in the audit chain
    # a response on another grouping of the same points is another chart's: still open there
    with shop.read() as s:
        _, by_drawing = signals.chart_and_episodes(
            session=s, metric="rms_nm", drawing="W-1", by="drawing"
        )
    assert set(by_drawing["status"]) == {"open"}
    with pytest.raises(sa.exc.DatabaseError, match="write-once"), shop.write() as s:
        s.execute(
            sa.text("UPDATE signal_response SET cause = 'nothing' WHERE id = :i"),
            {"i": response.id},
        )


def test_a_response_names_real_measurements_and_a_known_metric(shop, admin, charted):
    base = {"drawing": "W-1", "by": "machine", "group": "Lap 1", "cause": "c", "action": "a"}
    with pytest.raises(ShopdbError, match="no measurement 99999"), shop.write() as s:
        signals.record_response(
            session=s,
            actor=admin,
            metric="rms_nm",
            first_measurement_id=99999,
            last_measurement_id=charted[0],
            **base,
        )
    with pytest.raises(ShopdbError, match="rms_micro"), shop.write() as s:
        signals.record_response(
            session=s,
            actor=admin,
            metric="rms_micro",
            first_measurement_id=charted[0],
            last_measurement_id=charted[0],
            **base,
        )
    with shop.read() as s:
        assert s.exec(sa.select(sa.func.count()).select_from(m.SignalResponse)).one()[0] == 0
