"""Part outcomes and KPIs read from the records (the verdict owner's stored judgements), on both
backends.

Six parts with outcomes worked out by hand from the definitions in :mod:`shopdb.spc.kpi`
(first-pass yield, rework and scrap rates: common practice) and the ISO 10110-5 callout
3/A(B) with A and B in fringes of λ/2 (ISO 10110-5:2015, 3/A(B)).
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest

from shopdb import models as m
from shopdb.services import verdict
from shopdb.services.lookups import drawing_callout
from shopdb.services.reads import kpi as q
from shopdb.surface.settings import AnalysisSettings

T0 = datetime(2026, 1, 5, tzinfo=UTC)


def _day(d: float) -> datetime:
    return T0 + timedelta(days=d)


@pytest.fixture
def outcomes_shop(shop):
    """P1 passes first time; P2 fails band 1 and is reworked; P3 fails sag and irregularity and is
    scrapped; P4 passed its first analysis but its newer result (a reanalysis) fails; P5 is still
    in process (not counted); P6 was measured outside any run and has no irregularity value."""
    with shop.write() as s:
        # λ = 600 nm: a fringe is 300 nm; D1 sag 300 nm, irregularity 150 nm; D2 600 and 60 nm
        d1 = m.Drawing(
            number="D1",
            revision="A",
            surface_form_callout="3/1(0.5); λ = 600 nm; band1 < 2 nm",
            test_wavelength_nm=600,
            clear_aperture_mm=50,
        )
        d2 = m.Drawing(
            number="D2",
            revision="A",
            surface_form_callout="3/2(0.2); λ = 600 nm",
            test_wavelength_nm=600,
            clear_aperture_mm=50,
        )
        ma, mb = m.Machine(name="M-A"), m.Machine(name="M-B")
        st = m.Station(name="S", wavelength_nm=600, requires_reference=False)
        s.add_all([d1, d2, ma, mb, st])
        s.flush()
        n = 0

        def measure(part, run, day, results):
            nonlocal n
            n += 1
            me = m.Measurement(
                part_id=part.id,
                run_id=run.id if run else None,
                station_id=st.id,
                measured_at=_day(day),
                wavelength_nm=600,
                dx_mm=0.1,
                source_sha256=f"{n:064x}",
                blob_key=f"{n:064x}",
            )
            s.add(me)
            s.flush()
            drawing, callout = drawing_callout(s, part.drawing_id)
            for k, (sag, irr, band) in enumerate(results):
                res = m.SurfaceResult(
                    measurement_id=me.id,
                    settings_hash=f"h{k}",
                    software_version="t",
                    pv_nm=1.0,
                    rms_nm=1.0,
                    sag_nm=sag,
                    irregularity_nm=irr,
                    valid_fraction=1.0,
                    psd_bands=[{"low_per_mm": 0.0, "high_per_mm": 1.0, "rms_nm": band}],
                )
                s.add(res)
                s.flush()
                # as ingest does: the verdict owner judges the result when it is stored
                conf = verdict.judge_map(
                    res.model_dump(),
                    callout,
                    surface=None,
                    settings=AnalysisSettings(),
                    clear_aperture_mm=drawing.clear_aperture_mm,
                    min_valid_fraction=drawing.min_valid_fraction,
                )
                verdict.record(s, result_id=res.id, drawing_id=drawing.id, conformance=conf)

        def part(serial, drawing, status):
            p = m.Part(serial=serial, drawing_id=drawing.id, status=status)
            s.add(p)
            s.flush()
            return p

        def run(p, it, machine, day, rework=False):
            r = m.PolishingRun(
                part_id=p.id,
                iteration=it,
                machine_id=machine.id,
                started_at=_day(day),
                params={"rework": True} if rework else {"pad": "felt"},
            )
            s.add(r)
            s.flush()
            return r

        p1 = part("P1", d1, "passed")
        measure(p1, run(p1, 1, ma, 0), 1, [(50, 400, 1.0)])
        measure(p1, run(p1, 2, mb, 2), 4, [(50, 100, 1.0)])
        p2 = part("P2", d1, "passed")
        measure(p2, run(p2, 1, ma, 0), 2, [(-50, 100, 3.0)])
        measure(p2, run(p2, 2, mb, 5, rework=True), 7, [(-50, 100, 1.0)])
        p3 = part("P3", d2, "scrapped")
        measure(p3, run(p3, 1, ma, 30), 31, [(-700, 80, 1.0)])
        p4 = part("P4", d2, "passed")
        measure(p4, run(p4, 1, mb, 30), 32, [(10, 50, 1.0), (10, 70, 1.0)])
        p5 = part("P5", d1, "in_process")
        measure(p5, run(p5, 1, ma, 30), 33, [(10, 999, 1.0)])
        p6 = part("P6", d2, "passed")
        measure(p6, None, 34, [(10, None, 1.0)])
    return shop


def test_outcomes_per_part_by_hand(outcomes_shop):
    with outcomes_shop.read() as s:
        o = q.part_outcomes(session=s, by="machine").set_index("part")
    assert list(o.index) == ["P1", "P2", "P3", "P4", "P6"]  # P5 is in process
    assert o["first_pass"].to_dict() == {
        "P1": True,
        "P2": False,
        "P3": False,
        "P4": False,
        "P6": False,
    }
    assert o["failed_fields"].map(sorted).to_dict() == {
        "P1": [],
        "P2": ["band1"],  # its final inspection is the one before the rework run
        "P3": ["irregularity", "sag"],
        "P4": ["irregularity"],  # the newest result counts
        "P6": ["irregularity"],  # no value fails
    }
    assert o["reworks"].to_dict() == {"P1": 0, "P2": 1, "P3": 0, "P4": 0, "P6": 0}
    assert o["scrapped"].to_dict() == {
        "P1": False,
        "P2": False,
        "P3": True,
        "P4": False,
        "P6": False,
    }
    # polishing runs to the first measurement meeting the callout
    assert o["iterations"].fillna(-1).to_dict() == {"P1": 2, "P2": 2, "P3": -1, "P4": -1, "P6": -1}
    # first run start to last measurement
    assert o["cycle_days"].to_dict() == pytest.approx({"P1": 4, "P2": 7, "P3": 1, "P4": 2, "P6": 0})
    # the machine of the final inspection's run
    assert o["group"].to_dict() == {
        "P1": "M-B",
        "P2": "M-A",
        "P3": "M-A",
        "P4": "M-B",
        "P6": "(none)",
    }


def test_kpis_by_month_and_pareto_by_hand(outcomes_shop):
    with outcomes_shop.read() as s:
        k, pareto = q.kpi_table(session=s, by="month")
        window = q.part_outcomes(session=s, start=_day(30), end=_day(40))
    k = k.set_index("group")
    assert list(k.index) == ["2026-01", "2026-02"]
    assert k.loc["2026-01", "inspected"] == 2 and k.loc["2026-02", "inspected"] == 3
    assert k.loc["2026-01", "first_pass_yield"] == pytest.approx(1 / 2)
    assert k.loc["2026-02", "first_pass_yield"] == 0
    assert k.loc["2026-01", "rework_rate"] == pytest.approx(1 / 2)
    assert k.loc["2026-02", "scrap_rate"] == pytest.approx(1 / 3)
    assert pareto["reason"].tolist() == ["irregularity", "band1", "sag"]
    assert pareto["count"].tolist() == [3, 1, 1]
    assert pareto["cumulative_share"].tolist() == pytest.approx([0.6, 0.8, 1.0])
    assert window["part"].tolist() == ["P3", "P4", "P6"]  # measured in the window
