"""The reduced demo shop: built through the real ingest path, its stories found by shopdb's own analytics."""

from __future__ import annotations

import pandas as pd
import pytest
import sqlalchemy as sa

from shopdb.config import load_settings
from shopdb.seed_demo.build import PAD_CHANGE, SHIFT_DAY, build_demo
from shopdb.services.reads import charts, drift, kpi
from shopdb.services.session import open_shop
from shopdb.spc import convergence as conv


@pytest.fixture(scope="module")
def demo(small_demo):
    shop = open_shop(load_settings(small_demo))
    yield shop
    shop.engine.dispose()


@pytest.mark.slow
def test_story_a_mid_spatial_band_out_of_control_after_the_pad_change(demo):
    with demo.read() as s:
        t = charts.control_chart(
            session=s, metric="band:3", drawing="KR-100-W", by="machine", baseline=10
        )
    t["when"] = pd.to_datetime(t["measured_at"], utc=True)
    cnc = t[t["group"] == "CNC 3"]
    flagged = cnc["rules"].map(len) > 0
    assert flagged[cnc["when"] >= PAD_CHANGE].mean() > 0.3
    assert flagged[cnc["when"] < PAD_CHANGE].mean() < 0.1
    assert {"CNC 3"} == set(t["group"])  # the window lots all ran on CNC 3 in the small demo


@pytest.mark.slow
def test_story_b_drifting_reference_is_overdue_and_touches_released_lots(demo):
    with demo.read() as s:
        info = drift.reference_drift(session=s, reference="TF-B")
        impact = drift.drift_impact(session=s, reference="TF-B")
        calm = drift.reference_drift(session=s, reference="TF-A")
    lo, hi = info["drift"].rate_ci
    assert lo <= 2.5 <= hi and info["drift"].rate_per_month > 1.5  # nm/month of power, as built
    assert info["overdue"] and not calm["overdue"]
    assert abs(calm["drift"].rate_per_month) < 0.5
    assert not impact.empty and "released" in set(impact["lot_status"])


@pytest.mark.slow
def test_story_c_stalled_parts_are_called_stalled(demo):
    with demo.read() as s:
        info = charts.part_convergence(session=s, serial="150-0100")
        status = s.execute(sa.text("SELECT status FROM part WHERE serial = '150-0100'")).scalar()
    runs = info["per_run"]
    first = runs[runs["machine"] == runs["machine"].iloc[0]]  # before it moved to another machine
    stalled = conv.analyse(
        first["iteration"].to_numpy(float),
        first["value"].abs().to_numpy(float),
        tolerance=info["tolerance"],
    )
    assert stalled.status == "stalled"
    # scrapped, or rescued by rework on another machine (and then perhaps released with its lot)
    assert status in ("scrapped", "passed", "released")


@pytest.mark.slow
def test_story_d_first_pass_yield_dips_for_one_month(demo):
    with demo.read() as s:
        k, pareto = kpi.kpi_table(session=s, by="month")
    k = k.set_index("group")
    worst = k["first_pass_yield"].idxmin()
    assert worst == "2026-04" and k.loc[worst, "first_pass_yield"] <= 0.25
    assert k.drop(index=worst)["first_pass_yield"].mean() > 0.6
    assert not pareto.empty


@pytest.mark.slow
def test_story_e_check_standard_shift_on_one_day(demo):
    with demo.read() as s:
        t = charts.station_check(session=s, station="Bench North")
    t["day"] = pd.to_datetime(t["measured_at"], utc=True).dt.date
    shift = t[t["day"] == SHIFT_DAY.date()]
    assert len(shift) == 2 and shift["rules"].map(lambda r: "N1" in r).all()
    assert t["statistic"].idxmax() in shift.index


@pytest.mark.slow
def test_the_demo_is_healthy_and_deterministic(demo, tmp_path):
    from shopdb.services.health import check

    report = check(shop=demo)
    assert report.healthy and report.audit_events > 100
    other = tmp_path / "again"
    build_demo(load_settings(other), size="small")
    cols = "measurement_id, settings_hash, pv_nm, rms_nm, pvr_nm, sag_nm, irregularity_nm, valid_fraction"
    sql = f"SELECT {cols} FROM surface_result ORDER BY id"
    with demo.engine.connect() as c:
        a = c.execute(sa.text(sql)).all()
    second = open_shop(load_settings(other))
    with second.engine.connect() as c:
        b = c.execute(sa.text(sql)).all()
    second.engine.dispose()
    assert a == b and len(a) > 150


def test_demo_refuses_to_delete_a_folder_that_is_not_a_demo(tmp_path):
    from shopdb.errors import ShopdbError

    (tmp_path / "precious.txt").write_text("keep me")
    with pytest.raises(ShopdbError, match="not a demo folder"):
        build_demo(load_settings(tmp_path), fresh=True, size="small")
    assert (tmp_path / "precious.txt").exists()


@pytest.mark.slow
def test_story_f_parts_accepted_close_to_the_limit(demo):
    """KR-050-M is judged by guarded acceptance (ILAC-G8 §4.2.2): parts under a limit by less
    than U are not a pass; QA accepted them with a deviation and the reason; under simple
    acceptance a part inside its uncertainty range is a conditional pass."""
    from shopdb.services import release
    from shopdb.spc import decision

    close, conditional_pass = [], []
    with demo.read() as s:
        for lot in release.lots(session=s, include_signed=True):
            ev = release.lot_evidence(session=s, code=lot["lot"])
            for p in ev["parts"]:
                d = p["disposition"]
                inside = [f for f in p["fields"] if f["zone"] == decision.UNCERTAINTY_RANGE]
                if (
                    d
                    and d["decision"] == "accept_deviation"
                    and "close to the limit" in d["reason"]
                ):
                    assert ev["decision_rule"] == "strict" and inside
                    close.append(p["serial"])
                if ev["decision_rule"] == "simple" and p["verdict"] == "pass":
                    conditional_pass += [f for f in inside if f["outcome"] == "conditional pass"]
    assert close and conditional_pass
