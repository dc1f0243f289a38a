"""Ingest: one transaction per file, idempotent, clean refusals with nothing written."""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np
import pytest
import sqlalchemy as sa

from shopdb.errors import PermissionDenied, ShopdbError
from shopdb.formats import Metadata, read_map, write_map
from shopdb.seed_demo.factories import basic_shop, disk_map
from shopdb.services import masterdata as md
from shopdb.services.ingest import ingest, read_ahead, reanalyze
from shopdb.services.users import add_user
from shopdb.surface.analysis import analyze
from shopdb.surface.settings import AnalysisSettings

from ..formats.bad_corpus import make_corpus

WHEN = datetime(2026, 2, 1, 9, 30, tzinfo=UTC)
RNG = np.random.default_rng(3)


def counts(shop) -> dict[str, int]:
    with shop.engine.connect() as conn:
        out = {
            t: conn.execute(sa.text(f"SELECT COUNT(*) FROM {t}")).scalar()
            for t in ("measurement", "surface_result", "zernike_term", "audit_event")
        }
    out["blobs"] = len(list(shop.blobs.keys()))
    out["staged blob files"] = len(shop.blobs.stray_temp_files())
    return out


@pytest.fixture
def world(shop, admin):
    with shop.write() as session:
        return basic_shop(session, admin)


def _terms(shop, result_id: int) -> dict[tuple[int, int], float]:
    from shopdb.models import ZernikeTerm

    with shop.read() as session:
        rows = session.exec(sa.select(ZernikeTerm).where(ZernikeTerm.result_id == result_id))
        return {(t.n, t.m): t.coef_nm for t in rows.scalars()}


def _ingest(shop, admin, path, **kw):
    args = {"part_serial": "W-0001", "station_name": "Bench 1", "measured_at": WHEN} | kw
    with shop.write() as session:
        return ingest(session=session, blobs=shop.blobs, actor=admin, path=path, **args)


def test_ingest_stores_everything_once(shop, admin, world, tmp_path):
    m = disk_map({(2, 0): 40.0, (2, 2): 8.0}, npix=64, noise_nm=0.5, rng=RNG)
    write_map(tmp_path / "w1.x3p", m)
    before = counts(shop)
    out = _ingest(shop, admin, tmp_path / "w1.x3p")
    assert out.status == "ingested"
    after = counts(shop)
    assert after["measurement"] - before["measurement"] == 1
    assert after["surface_result"] - before["surface_result"] == 1
    assert after["zernike_term"] - before["zernike_term"] == 66
    assert after["audit_event"] - before["audit_event"] == 1
    assert after["blobs"] == 1
    expected = analyze(
        type(m)(m.height_nm.astype(np.float32).astype(float), m.dx_mm, m.wavelength_nm)
    )
    assert out.summary["rms_nm"] == pytest.approx(expected.rms_nm, rel=1e-12)
    with shop.read() as session:
        from shopdb.models import Measurement

        row = session.get(Measurement, out.measurement_id)
        assert row.reference_calibration_id == world["calibration"].id and row.measured_at == WHEN
    # the same bytes again: reported, nothing written
    again = _ingest(shop, admin, tmp_path / "w1.x3p")
    assert again.status == "duplicate" and again.measurement_id == out.measurement_id
    assert f"already recorded as measurement {out.measurement_id}" in again.message
    assert counts(shop) == after


@pytest.mark.parametrize(
    "kw,message",
    [
        ({"part_serial": "NOPE"}, "unknown part serial 'NOPE'"),
        ({"station_name": "Bench 9"}, "unknown station 'Bench 9'"),
        (
            {"measured_at": datetime(2026, 6, 1, tzinfo=UTC)},
            "reference TF-1 calibration expired 2026-04-01",
        ),
        ({"measured_at": datetime(2025, 6, 1, tzinfo=UTC)}, "reference TF-1 has no calibration"),
        ({"run_iteration": 4}, "has no polishing run 4"),
    ],
)
@pytest.mark.parametrize("ahead", [False, True], ids=["direct", "read-ahead"])
def test_refusals_write_nothing(shop, admin, world, tmp_path, kw, message, ahead):
    """Refused after a good read: no rows, no blob, and (read ahead, as a batch takes it) no
    staged blob file left."""
    path = tmp_path / "w.npz"
    write_map(path, disk_map({(2, 0): 10.0}, npix=48))
    before = counts(shop)
    if ahead:
        with shop.read() as session:
            from shopdb.models import Station

            bench = session.exec(sa.select(Station).where(Station.name == "Bench 1")).scalar_one()
        kw = kw | {"prefetched": next(read_ahead([path], bench, blobs=shop.blobs))[1]()}
    with pytest.raises(ShopdbError, match=message):
        _ingest(shop, admin, path, **kw)
    assert counts(shop) == before


def test_bad_corpus_through_ingest_writes_nothing(shop, admin, world, tmp_path):
    expected = make_corpus(tmp_path / "bad")
    before = counts(shop)
    for name, message in expected.items():
        if name == "good.x3p":
            continue
        meta = Metadata(dx_mm=0.1) if name.endswith(".npy") else Metadata()
        with pytest.raises(ShopdbError) as info:
            _ingest(shop, admin, tmp_path / "bad" / name, metadata=meta)
        assert message in str(info.value) and name in str(info.value), name
        assert "\n" not in str(info.value)
    assert counts(shop) == before


def test_read_ahead_batch_records_as_one_by_one(shop, admin, world, tmp_path):
    """A batch read ahead (as `shopdb ingest` takes it) gives the outcomes and stored results
    of ingesting each file alone: good, duplicate, malformed, missing (common practice: a
    pipelined batch must not change what is recorded)."""
    files = []
    for i in range(3):
        m = disk_map({(2, 0): 40.0 + i}, npix=64, noise_nm=0.5, rng=RNG)
        files.append(tmp_path / f"b{i}.x3p")
        write_map(files[-1], m)
    (tmp_path / "bad.x3p").write_bytes(b"not a zip")
    batch = [files[0], files[1], files[0], tmp_path / "bad.x3p", tmp_path / "gone.x3p", files[2]]
    with shop.read() as session:
        from shopdb.models import Station

        station = session.exec(sa.select(Station).where(Station.name == "Bench 1")).scalar_one()
    got = []
    for path, prefetched in read_ahead(batch, station, blobs=shop.blobs):
        try:
            got.append(_ingest(shop, admin, path, prefetched=prefetched()))
        except ShopdbError as exc:
            got.append(str(exc))
    assert shop.blobs.stray_temp_files() == []  # the duplicate's staged blob is gone
    assert len(list(shop.blobs.keys())) == 3
    assert [g.status if not isinstance(g, str) else g.split(":")[0] for g in got] == [
        "ingested",
        "ingested",
        "duplicate",
        "bad.x3p",
        "gone.x3p",
        "ingested",
    ]
    assert got[2].measurement_id == got[0].measurement_id
    assert "no such file" in got[4]
    assert counts(shop)["measurement"] == 3
    for path, out in zip(files, (got[0], got[1], got[5]), strict=True):
        m = read_map(path, metadata=Metadata(wavelength_nm=632.8))
        expected = analyze(
            type(m)(m.height_nm.astype(np.float32).astype(float), m.dx_mm, m.wavelength_nm),
            AnalysisSettings(),
        )
        assert out.summary["rms_nm"] == pytest.approx(expected.rms_nm, rel=1e-12)
    # a read of another file is not taken for this one (it would name b1's measurement)
    other = next(read_ahead([files[1]], station, blobs=shop.blobs))[1]()
    again = _ingest(shop, admin, files[2], prefetched=other)
    assert again.status == "duplicate" and again.measurement_id == got[5].measurement_id
    # a batch stopped after its first file: the read handed out is still the caller's to
    # store, the one read ahead and not handed out leaves no staged blob
    fresh, unread = tmp_path / "b9.x3p", tmp_path / "b10.x3p"
    for i, f in enumerate((fresh, unread)):
        write_map(f, disk_map({(2, 0): 9.0 + i}, npix=64, noise_nm=0.5, rng=RNG))
    read = next(read_ahead([fresh, unread], station, blobs=shop.blobs))[1]()
    assert _ingest(shop, admin, fresh, prefetched=read).status == "ingested"
    assert shop.blobs.stray_temp_files() == []
    assert len(list(shop.blobs.keys())) == 4


def test_operator_may_ingest_manager_may_not(shop, admin, world, tmp_path):
    with shop.write() as session:
        boss = add_user(
            session=session,
            actor=admin,
            username="boss",
            display_name="B",
            role="manager",
            password="managers-password",
        )
    write_map(tmp_path / "w.npz", disk_map({(2, 0): 10.0}, npix=48))
    with pytest.raises(PermissionDenied, match="may not ingest"):
        _ingest(shop, boss, tmp_path / "w.npz")


def test_links_to_the_latest_run_or_the_named_one(shop, admin, world, tmp_path):
    with shop.write() as session:
        r1 = md.start_run(
            session=session, actor=admin, part_serial="W-0001", machine_name="Polisher A"
        )
        r2 = md.start_run(
            session=session, actor=admin, part_serial="W-0001", machine_name="Polisher A"
        )
    assert (r1.iteration, r2.iteration) == (1, 2)
    write_map(tmp_path / "a.npz", disk_map({(2, 0): 10.0}, npix=48))
    write_map(tmp_path / "b.npz", disk_map({(2, 0): 11.0}, npix=48))
    a = _ingest(shop, admin, tmp_path / "a.npz")
    b = _ingest(shop, admin, tmp_path / "b.npz", run_iteration=1)
    from shopdb.models import Measurement

    with shop.read() as session:
        assert session.get(Measurement, a.measurement_id).run_id == r2.id
        assert session.get(Measurement, b.measurement_id).run_id == r1.id


def test_subtracting_a_known_reference_error_recovers_the_test_surface(shop, admin, tmp_path):
    """Measured = part + reference error (3 nm defocus, 1 nm astigmatism, the calibration's coefficients):
    with subtraction the fit returns the part's own coefficients. The clear aperture is the part's
    100 mm diameter, so both are normalised on the same circle."""
    with shop.write() as session:
        basic_shop(session, admin, station_profile={"settings": {"clear_aperture_mm": 100.0}})
    true = {(2, 0): 12.0, (3, 1): 2.0}
    both = {(2, 0): 15.0, (3, 1): 2.0, (2, 2): 1.0}
    write_map(tmp_path / "m.npz", disk_map(both, npix=96, fill=0.9))
    out = _ingest(shop, admin, tmp_path / "m.npz", subtract_reference=True)
    terms = _terms(shop, out.result_id)
    assert terms[(2, 0)] == pytest.approx(true[(2, 0)], abs=1e-6)
    assert terms[(3, 1)] == pytest.approx(true[(3, 1)], abs=1e-6)
    assert abs(terms[(2, 2)]) < 1e-6


@pytest.mark.parametrize("path", ["coefficients", "error map"])
def test_reference_subtraction_follows_the_station_orientation(shop, admin, tmp_path, path):
    """The instrument sees the part mirrored (the station flips it back, profile flip lr) and the
    reference in its own coordinates; after the station's flip the reference appears mirrored,
    so the profile says reference_flip lr. Coma x and astigmatism 45 change sign under that
    mirror (x -> -x): subtracting the unflipped calibration would double them instead."""
    from datetime import timedelta

    with shop.write() as session:
        w = basic_shop(
            session,
            admin,
            station_profile={
                "settings": {"clear_aperture_mm": 100.0},
                "flip": "lr",
                "reference_flip": "lr",
            },
        )
        ref_coefs = {(2, 0): 3.0, (3, 1): 2.0, (2, -2): 1.5}
        key = None
        if path == "error map":
            key = shop.blobs.put(
                disk_map(ref_coefs, npix=96, fill=0.9).height_nm.astype(np.float32)
            )
        md.add_calibration(
            session=session,
            actor=admin,
            reference_id=w["reference"].id,
            calibrated_at=WHEN - timedelta(days=1),
            valid_until=WHEN + timedelta(days=30),
            method="three-flat",
            uncertainty_nm=0.2,
            coefficients={f"{n},{m}": c for (n, m), c in ref_coefs.items()},
            error_map_blob=key,
        )
    part = {(2, 0): 12.0, (3, 1): 4.0, (3, -1): -1.0}
    # the part as the instrument sees it: mirrored
    seen = disk_map(part, npix=96, fill=0.9).height_nm[:, ::-1]
    raw = seen + disk_map(ref_coefs, npix=96, fill=0.9).height_nm
    write_map(tmp_path / "m.npz", type(disk_map(part, npix=96))(raw, 100 / (0.9 * 96), 632.8))
    out = _ingest(shop, admin, tmp_path / "m.npz", subtract_reference=True)
    terms = _terms(shop, out.result_id)
    tol = 1e-4 if path == "coefficients" else 1e-3  # the stored map is float32
    for t, c in part.items():
        assert terms[t] == pytest.approx(c, abs=tol), t
    assert abs(terms[(2, -2)]) < tol


def test_station_orientation_is_applied(shop, admin, tmp_path):
    with shop.write() as session:
        basic_shop(session, admin, station_profile={"flip": "lr"})
    m = disk_map({(1, 1): 10.0}, npix=48)  # tilt along +x
    write_map(tmp_path / "t.npz", m)
    out = _ingest(shop, admin, tmp_path / "t.npz")
    with shop.read() as session:
        from shopdb.models import ZernikeTerm

        c11 = session.exec(
            sa.select(ZernikeTerm.coef_nm).where(
                ZernikeTerm.result_id == out.result_id, ZernikeTerm.n == 1, ZernikeTerm.m == 1
            )
        ).scalar()
    # mirrored left-right: tilt x changes sign (magnitude within the fitted circle's ~0.2 px radius)
    assert c11 == pytest.approx(-10.0, rel=1e-2)


def test_reanalyze_adds_results_and_keeps_old_ones(shop, admin, world, tmp_path):
    write_map(tmp_path / "m.npz", disk_map({(2, 0): 10.0, (4, 0): 2.0}, npix=64))
    out = _ingest(shop, admin, tmp_path / "m.npz")
    new = AnalysisSettings(remove=("piston", "tilt", "power"), zernike_order=8)
    with shop.write() as session:
        assert reanalyze(session=session, blobs=shop.blobs, actor=admin, settings=new) == (1, 0)
    with shop.write() as session:
        assert reanalyze(session=session, blobs=shop.blobs, actor=admin, settings=new) == (0, 1)
    with shop.read() as session:
        from shopdb.models import SurfaceResult

        rows = (
            session.exec(
                sa.select(SurfaceResult)
                .where(SurfaceResult.measurement_id == out.measurement_id)
                .order_by(SurfaceResult.id)
            )
            .scalars()
            .all()
        )
    assert len(rows) == 2 and rows[0].settings_hash != rows[1].settings_hash
    assert rows[1].rms_nm < rows[0].rms_nm  # power removed


def test_reanalyze_all_analyses_outside_the_write_lock(shop, admin, world, tmp_path, monkeypatch):
    """A long reanalyze must not lock the shop: every map is analysed with no write
    transaction open (another writer gets the lock at once), the results are written in short
    batches, and a second run finds nothing left to do."""
    import shopdb.services.ingest as ingest_mod

    for i, c in enumerate((10.0, 12.0, 14.0)):
        write_map(tmp_path / f"m{i}.npz", disk_map({(2, 0): c, (3, 1): 1.0 + i}, npix=48))
        _ingest(shop, admin, tmp_path / f"m{i}.npz")
    new = AnalysisSettings(remove=("piston", "tilt", "power"), zernike_order=8)
    real, free = ingest_mod.analyze, []

    def probe_lock(surface, settings):
        if shop.engine.dialect.name == "sqlite":
            import sqlite3

            other = sqlite3.connect(shop.settings.database_url.split("///", 1)[1], timeout=0.05)
            other.isolation_level = None
            other.execute("BEGIN IMMEDIATE")  # raises "database is locked" if a writer holds it
            other.execute("ROLLBACK")
            other.close()
        free.append(True)
        return real(surface, settings)

    monkeypatch.setattr(ingest_mod, "analyze", probe_lock)
    monkeypatch.setattr(ingest_mod, "REANALYZE_BATCH", 2)
    assert ingest_mod.reanalyze_all(shop=shop, actor=admin, settings=new) == (3, 0)
    assert len(free) == 3
    assert ingest_mod.reanalyze_all(shop=shop, actor=admin, settings=new) == (0, 3)
