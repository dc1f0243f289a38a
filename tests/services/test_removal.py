"""What a run removed, per machine, and the lap ranking, on both databases: against maps built
from known orthonormal Zernike terms (ANSI Z80.28 normalisation: a term's RMS over the disk is
its coefficient) and Preston's law (Preston 1927)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest

from shopdb.formats import write_map
from shopdb.seed_demo.factories import basic_shop, disk_map
from shopdb.services import masterdata as md
from shopdb.services import removal
from shopdb.services.health import check
from shopdb.services.ingest import ingest

T0 = datetime(2026, 2, 1, 8, 0, tzinfo=UTC)
PARAMS = {"pad": "std", "pressure_kpa": 8.0, "speed_m_s": 0.5, "dwell_min": 30.0}


@pytest.fixture
def world(shop, admin):
    with shop.write() as session:
        w = basic_shop(session, admin)
        md.add_machine(session=session, actor=admin, name="Lap B", kind="pitch lap")
        for serial in ("W-0002", "W-0003"):
            md.add_part(
                session=session,
                actor=admin,
                serial=serial,
                drawing_id=w["drawing"].id,
                lot_id=w["lot"].id,
            )
        return w


def _measure(shop, admin, tmp_path, serial, coefs, when, name):
    write_map(tmp_path / f"{name}.npz", disk_map(coefs, npix=64))
    with shop.write() as session:
        return ingest(
            session=session,
            blobs=shop.blobs,
            actor=admin,
            path=tmp_path / f"{name}.npz",
            part_serial=serial,
            station_name="Bench 1",
            measured_at=when,
        )


def _run(shop, admin, serial, machine, when, **params):
    with shop.write() as session:
        md.start_run(
            session=session,
            actor=admin,
            part_serial=serial,
            machine_name=machine,
            started_at=when,
            params=PARAMS | params,
        )


def test_a_run_records_what_it_removed(shop, admin, world, tmp_path):
    """before: 30 nm power + 5 nm astigmatism; after: 12 nm power + 5 nm astigmatism. The
    removal is 18 nm of power: its RMS 18 nm, its (2, 0) term 18 nm, the astigmatism gone;
    Preston: 720 nm in 30 min at 8 kPa and 0.5 m/s is 720e-9 / (8e3 × 0.5 × 1800) 1/Pa."""
    _measure(shop, admin, tmp_path, "W-0001", {(2, 0): 30.0, (2, 2): 5.0}, T0, "a")
    _run(shop, admin, "W-0001", "Polisher A", T0 + timedelta(hours=1), removed_nm=720)
    _measure(
        shop, admin, tmp_path, "W-0001", {(2, 0): 12.0, (2, 2): 5.0}, T0 + timedelta(hours=3), "b"
    )
    with shop.read() as session:
        (row,) = removal.part_removals(session=session, serial="W-0001")
    assert row["removal_rms_nm"] == pytest.approx(18.0, rel=0.02)
    assert row["preston_per_pa"] == pytest.approx(720e-9 / (8e3 * 0.5 * 1800), rel=1e-9)
    # the form band's RMS shrinks about as the form does, sqrt(12² + 5²) / sqrt(30² + 5²) = 0.43
    # (the PSD's windowed lowest band is not exactly the Zernike RMS: within 10 %)
    assert row["band_ratio"][0] == pytest.approx(13.0 / 30.4, rel=0.1)
    with shop.read() as session:
        (entry,) = removal.machine_removals(session=session)
    terms = {(n, m): c for n, m, c in entry["mean_shape_nm"]}
    assert terms[(2, 0)] == pytest.approx(18.0, rel=0.02) and abs(terms.get((2, 2), 0)) < 0.3
    report = check(shop=shop)  # the removal's map is a referenced blob, not an orphan
    assert report.orphans == [] and report.healthy, report.text()
    # a later measurement of the same run: a newer record supersedes
    _measure(
        shop, admin, tmp_path, "W-0001", {(2, 0): 10.0, (2, 2): 5.0}, T0 + timedelta(hours=4), "c"
    )
    with shop.read() as session:
        (row,) = removal.part_removals(session=session, serial="W-0001")
    assert row["removal_rms_nm"] == pytest.approx(20.0, rel=0.02)


def test_the_lap_whose_removal_fits_the_error_ranks_first(shop, admin, world, tmp_path):
    """Lap B has removed astigmatism, Polisher A power; a part left with astigmatism ranks Lap B
    first, with the spread of its removals as the interval."""
    t = T0
    for k, (serial, machine, removed) in enumerate(
        [("W-0002", "Lap B", (2, 2)), ("W-0003", "Polisher A", (2, 0))] * 1
    ):
        for run in range(3):
            amount = 20.0 + 2 * run
            before = {removed: 40.0 - 10 * run}
            after = {removed: 40.0 - 10 * run - amount}
            _measure(shop, admin, tmp_path, serial, before | {(4, 0): 1.0}, t, f"{k}{run}a")
            _run(shop, admin, serial, machine, t + timedelta(minutes=10))
            _measure(
                shop,
                admin,
                tmp_path,
                serial,
                after | {(4, 0): 1.0},
                t + timedelta(hours=1),
                f"{k}{run}b",
            )
            t += timedelta(hours=2)
    _measure(shop, admin, tmp_path, "W-0001", {(2, 2): 21.0}, t, "now")
    with shop.read() as session:
        ranked = removal.rank_machines(session=session, blobs=shop.blobs, serial="W-0001")
    assert [r["machine"] for r in ranked] == ["Lap B", "Polisher A"]
    assert (
        ranked[0]["irregularity_nm"]
        < ranked[0]["now_irregularity_nm"]
        < ranked[1]["irregularity_nm"]
    )
    assert ranked[0]["spread_nm"] > 0 and ranked[0]["removals"] == 3


def test_tifs_and_plans_are_records_and_the_run_names_its_plan(shop, admin, world, tmp_path):
    """A Gaussian and a spot-test TIF recorded for a machine, a plan kept with one, a run that
    names it, and the plan's prediction beside what the run achieved; a plan of another part, a
    plan followed twice and an operator recording a TIF are refused."""
    import numpy as np
    import scipy.signal

    from shopdb.errors import PermissionDenied, ShopdbError
    from shopdb.services import plan as planning
    from shopdb.services.users import add_user
    from shopdb.surface import dwell

    _measure(shop, admin, tmp_path, "W-0001", {(2, 0): 30.0, (3, 1): 6.0}, T0, "a")
    gauss = dwell.GaussianTIF(sigma_mm=3.0, peak_nm_per_s=2.0)
    spot = np.zeros((101, 101))
    spot[50, 50] = 20.0
    measured = dwell.spot_tif(
        np.zeros((101, 101)),
        -scipy.signal.fftconvolve(spot, gauss.kernel(0.4), mode="same"),
        0.4,
        20.0,
        diameter_mm=24.0,
    )
    with shop.write() as session:
        g = planning.add_tool_influence(
            session=session, blobs=shop.blobs, actor=admin, machine="Lap B", name="T6", tif=gauss
        )
        sp = planning.add_tool_influence(
            session=session,
            blobs=shop.blobs,
            actor=admin,
            machine="Lap B",
            name="T6 spot",
            tif=measured,
        )
        operator = add_user(
            session=session,
            actor=admin,
            username="op",
            display_name="Op One",
            role="operator",
            password="operator-pass-1",
        )
    with shop.write() as session, pytest.raises(PermissionDenied):
        planning.add_tool_influence(
            session=session, blobs=shop.blobs, actor=operator, machine="Lap B", name="X", tif=gauss
        )
    with shop.read() as session:
        model = planning.tif_model(planning.tool_influence(session, "T6 spot"), shop.blobs)
        assert model.volume_rate_mm3_per_min == pytest.approx(
            gauss.volume_rate_mm3_per_min, rel=0.02
        )
        out = planning.plan_next_run(
            session=session, blobs=shop.blobs, serial="W-0001", tif=gauss, spacing_mm=1.0
        )
    assert out["predicted"]["rms_nm"] < 0.2 * out["before"]["rms_nm"]
    with shop.write() as session:
        kept = planning.record_plan(
            session=session, blobs=shop.blobs, actor=admin, out=out, tif_row=g
        )
    with pytest.raises(ShopdbError, match="another part"):
        _run(shop, admin, "W-0002", "Lap B", T0 + timedelta(hours=1), plan_id=kept.id)
    _run(shop, admin, "W-0001", "Lap B", T0 + timedelta(hours=1), plan_id=kept.id)
    with pytest.raises(ShopdbError, match="followed by run 1 already"):
        _run(shop, admin, "W-0001", "Lap B", T0 + timedelta(hours=2), plan_id=kept.id)
    _measure(shop, admin, tmp_path, "W-0001", {(2, 0): 1.0}, T0 + timedelta(hours=3), "b")
    with shop.read() as session:
        (row,) = planning.plans_against_runs(session=session)
    assert row["plan_id"] == kept.id and row["predicted_rms_nm"] == pytest.approx(
        out["predicted"]["rms_nm"]
    )
    assert row["achieved_rms_nm"] == pytest.approx(
        1.0, rel=0.05
    )  # the orthonormal (2, 0) term's RMS
    assert sp.blob_key and check(shop=shop).healthy  # TIF and dwell maps are referenced blobs


def test_a_reanalysis_records_the_removal_anew_with_its_settings(shop, admin, world, tmp_path):
    from shopdb.services.ingest import reanalyze_all
    from shopdb.surface.settings import AnalysisSettings

    _measure(shop, admin, tmp_path, "W-0001", {(2, 0): 30.0}, T0, "a")
    _run(shop, admin, "W-0001", "Polisher A", T0 + timedelta(hours=1))
    _measure(shop, admin, tmp_path, "W-0001", {(2, 0): 12.0}, T0 + timedelta(hours=3), "b")
    with shop.read() as session:
        (first,) = removal.part_removals(session=session, serial="W-0001")
    new = AnalysisSettings(psd_band_edges_per_mm=(0.05, 0.5), zernike_order=6)
    reanalyze_all(shop=shop, actor=admin, settings=new)
    with shop.read() as session:
        (again,) = removal.part_removals(session=session, serial="W-0001")
    assert first["removal_bands"] != again["removal_bands"]
    assert [(b["low_per_mm"], b["high_per_mm"]) for b in again["removal_bands"]] == [(0.05, 0.5)]
    assert again["removal_rms_nm"] == pytest.approx(first["removal_rms_nm"])  # the same maps
