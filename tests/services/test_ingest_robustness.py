"""Ingest under crashes and concurrency, and the station watch folder."""

from __future__ import annotations

import multiprocessing as mp
import os
import random
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import sqlalchemy as sa

from shopdb.blobs import BlobStore
from shopdb.db import make_engine, write_session
from shopdb.errors import ShopdbError
from shopdb.formats import write_map
from shopdb.seed_demo.factories import basic_shop, disk_map
from shopdb.services.health import check
from shopdb.services.ingest import ingest, read_ahead
from shopdb.services.users import get_user
from shopdb.services.watch import Watcher
from shopdb.surface.settings import AnalysisSettings

ROOT = Path(__file__).resolve().parents[2]
SMALL = {"zernike_order": 4}


def _files(folder: Path, n: int, npix: int = 24) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(n)
    out = []
    for i in range(n):
        p = folder / f"m{i:03d}.npz"
        write_map(p, disk_map({(2, 0): 10.0 + i, (2, 2): 1.0}, npix=npix, noise_nm=0.2, rng=rng))
        out.append(p)
    return out


def worker(url: str, blob_dir: str, files: list[str]) -> None:
    """Ingest the files one transaction each, read ahead with staged blobs as `shopdb ingest`
    takes a batch (run in a child process)."""
    from datetime import UTC, datetime

    from shopdb.models import Station

    engine = make_engine(url)
    blobs = BlobStore(blob_dir)
    with write_session(engine) as s:
        admin = get_user(session=s, username="admin")
        station = s.exec(sa.select(Station).where(Station.name == "Bench 1")).scalar_one()
    for f, prefetched in read_ahead([Path(f) for f in files], station, blobs=blobs):
        with write_session(engine) as s:
            ingest(
                session=s,
                blobs=blobs,
                actor=admin,
                path=f,
                part_serial="W-0001",
                station_name="Bench 1",
                measured_at=datetime(2026, 2, 1, tzinfo=UTC),
                prefetched=prefetched(),
            )
        print(f, flush=True)  # progress, so the parent can kill mid-batch
    engine.dispose()


@pytest.fixture
def world(shop, admin):
    with shop.write() as session:
        return basic_shop(session, admin, station_profile={"settings": SMALL})


def _consistent(shop) -> dict[str, int]:
    """No partial records: each measurement has one result, each result its terms, each an audit event."""
    n_terms = (SMALL["zernike_order"] + 1) * (SMALL["zernike_order"] + 2) // 2
    with shop.engine.connect() as c:
        q = lambda sql: c.execute(sa.text(sql)).scalar()  # noqa: E731
        meas = q("SELECT COUNT(*) FROM measurement")
        assert q("SELECT COUNT(*) FROM surface_result") == meas
        assert q("SELECT COUNT(*) FROM callout_outcome") == meas
        assert q("SELECT COUNT(*) FROM zernike_term") == meas * n_terms
        assert q("SELECT COUNT(*) FROM audit_event WHERE table_name = 'measurement'") == meas
        assert q("SELECT COUNT(DISTINCT source_sha256) FROM measurement") == meas
    report = check(shop=shop, grace_s=0)
    assert report.missing == [] and report.corrupt == [] and report.audit_problem is None
    return {"measurements": meas, "orphans": len(report.orphans)}


@pytest.mark.slow
def test_sigkill_during_batch_ingest_leaves_no_partial_records(shop, world, tmp_path):
    """20 trials: a child ingesting 200 files (a rolling window, half of it new each trial) is
    SIGKILLed at a random moment; afterwards the records are consistent, check --fix removes any
    orphan blob and staged blob file, and a full re-run records each file exactly once."""
    files = [str(p) for p in _files(tmp_path / "maps", 2100, npix=16)]
    rnd = random.Random(1)
    code = (
        "import sys; from tests.services.test_ingest_robustness import worker; "
        "worker(sys.argv[1], sys.argv[2], sys.argv[3:])"
    )
    killed_mid_batch = 0
    for trial in range(20):
        batch = files[trial * 100 : trial * 100 + 200]
        proc = subprocess.Popen(
            [sys.executable, "-c", code, shop.settings.database_url, str(shop.blobs.root), *batch],
            cwd=ROOT,
            stdout=subprocess.PIPE,
            stderr=subprocess.DEVNULL,
            text=True,
        )
        # kill after a random number of files, at a random moment inside the next one
        for _ in range(rnd.randrange(1, 190)):
            if not proc.stdout.readline():
                break
        time.sleep(rnd.uniform(0.0, 0.01))
        if proc.poll() is None:
            proc.kill()
            killed_mid_batch += 1
        proc.communicate()
        _consistent(shop)
    assert killed_mid_batch >= 15  # the kills landed during the batch
    check(shop=shop, fix=True, grace_s=0)
    assert _consistent(shop)["orphans"] == 0 and shop.blobs.stray_temp_files() == []
    worker(shop.settings.database_url, str(shop.blobs.root), files)
    assert _consistent(shop)["measurements"] == len(files)


@pytest.mark.slow
def test_four_processes_overlapping_files_record_each_once(shop, world, tmp_path):
    files = [str(p) for p in _files(tmp_path / "maps", 60)]
    sets = [files[0:30], files[15:45], files[30:60], files[0:15] + files[45:60]]
    ctx = mp.get_context("spawn")
    procs = [
        ctx.Process(target=worker, args=(shop.settings.database_url, str(shop.blobs.root), fs))
        for fs in sets
    ]
    for p in procs:
        p.start()
    for p in procs:
        p.join(300)
    assert [p.exitcode for p in procs] == [0, 0, 0, 0]  # no lock errors, duplicates are not errors
    assert _consistent(shop)["measurements"] == 60


def test_watch_folder_ingests_moves_and_survives_restarts(shop, admin, world, tmp_path):
    folder = tmp_path / "bench"
    folder.mkdir()
    write_map(folder / "W-0001_a.npz", disk_map({(2, 0): 5.0}, npix=24))
    write_map(folder / "W-9999_b.npz", disk_map({(2, 0): 6.0}, npix=24))
    (folder / "nonsense.npz").write_bytes(b"not a map")

    def take(path, serial):
        with shop.write() as s:
            return ingest(
                session=s,
                blobs=shop.blobs,
                actor=admin,
                path=path,
                part_serial=serial,
                station_name="Bench 1",
                measured_at=_when(),
            ).message

    w = Watcher(folder, take, pattern=r"^(?P<serial>W-\d+)_", settle_s=0.0)
    assert w.poll() == []  # first sight: not yet known to be stable
    results = {name: (status, msg) for name, status, msg in w.poll()}
    assert results["W-0001_a.npz"][0] == "done"
    assert results["W-9999_b.npz"] == ("rejected", "W-9999_b.npz: unknown part serial 'W-9999'")
    assert (
        results["nonsense.npz"][0] == "rejected" and "serial pattern" in results["nonsense.npz"][1]
    )
    assert (
        (folder / "rejected" / "W-9999_b.npz.reason.txt")
        .read_text()
        .startswith("W-9999_b.npz: unknown part")
    )
    # a restart finds the same file dropped again: recorded once, moved to done/
    import shutil

    shutil.copy(folder / "done" / "W-0001_a.npz", folder / "W-0001_a.npz")
    w2 = Watcher(folder, take, pattern=r"^(?P<serial>W-\d+)_", settle_s=0.0)
    w2.poll()
    (item,) = w2.poll()
    assert item[1] == "done" and "already recorded" in item[2]
    assert sorted(p.name for p in (folder / "done").iterdir()) == ["W-0001_a.1.npz", "W-0001_a.npz"]


def test_watch_waits_for_a_growing_file(shop, admin, world, tmp_path):
    folder = tmp_path / "bench"
    folder.mkdir()
    taken = []
    w = Watcher(folder, lambda p, s: taken.append(p.name) or "ok", settle_s=0.0)
    f = folder / "W-0001.npz"
    f.write_bytes(b"12")
    w.poll()
    with f.open("ab") as fh:
        fh.write(b"34")  # still being written
    assert w.poll() == [] and taken == []
    assert w.poll()[0][1] == "done" and taken == ["W-0001.npz"]


def test_bad_serial_pattern():
    with pytest.raises(ShopdbError, match="no group named 'serial'"):
        Watcher(Path("."), lambda p, s: "", pattern="^W")


def _when():
    from datetime import UTC, datetime

    return datetime(2026, 2, 1, tzinfo=UTC)


def test_settings_used(world):
    assert AnalysisSettings.from_dict(world["station"].profile["settings"]).zernike_order == 4


def test_watch_never_follows_links_and_takes_only_regular_files(tmp_path):
    """A symbolic link (to a file outside the folder) and a FIFO are rejected without being
    opened; the outside file is neither read nor quoted (common practice: a drop folder is not
    a way to read the server's files)."""
    folder, outside = tmp_path / "bench", tmp_path / "secret.txt"
    folder.mkdir()
    outside.write_text("root:x:0:0 top secret\n")
    (folder / "W-0001_link.csv").symlink_to(outside)
    os.mkfifo(folder / "W-0002_pipe.csv")
    opened = []
    w = Watcher(folder, lambda p, s: opened.append(p) or "ok", settle_s=0.0)
    results = {name: (status, msg) for name, status, msg in w.poll()}
    assert results == {
        "W-0001_link.csv": ("rejected", "W-0001_link.csv: a symbolic link"),
        "W-0002_pipe.csv": ("rejected", "W-0002_pipe.csv: not a regular file"),
    }
    assert opened == [] and outside.read_text().startswith("root")
    assert (folder / "rejected" / "W-0001_link.csv").is_symlink()  # moved, not followed
    reasons = "".join(p.read_text() for p in (folder / "rejected").glob("*.reason.txt"))
    assert "secret" not in reasons


def test_watch_goes_on_after_any_failure_of_one_file(tmp_path):
    """An unexpected exception from one file is that file's one-line refusal, a 250-character
    name still gets its reason file, and the next file is taken."""
    folder = tmp_path / "bench"
    folder.mkdir()
    long_name = "W-0001_" + "x" * 239 + ".npz"  # 250 characters
    (folder / long_name).write_bytes(b"1")
    (folder / "W-0002_ok.npz").write_bytes(b"2")

    def take(path, serial):
        if serial == "W-0001":
            raise TypeError("'NoneType' object is not subscriptable")
        return "recorded"

    w = Watcher(folder, take, pattern=r"^(?P<serial>W-\d+)_", settle_s=0.0)
    w.poll()
    results = {name: (status, msg) for name, status, msg in w.poll()}
    assert results[long_name] == (
        "rejected",
        f"{long_name}: cannot be ingested (TypeError: 'NoneType' object is not subscriptable)",
    )
    assert results["W-0002_ok.npz"] == ("done", "recorded")
    (reason,) = (folder / "rejected").glob("*.reason.txt")
    assert len(reason.name.encode()) <= 255 and "TypeError" in reason.read_text()


def test_watch_leaves_a_file_while_the_database_is_down_or_the_file_is_in_use(tmp_path):
    import fcntl

    from sqlalchemy.exc import OperationalError

    folder = tmp_path / "bench"
    folder.mkdir()
    f, held = folder / "W-0001_a.npz", folder / "W-0002_b.npz"
    f.write_bytes(b"1")
    held.write_bytes(b"2")
    down = [True]

    def take(path, serial):
        if down[0]:
            raise OperationalError("SELECT 1", {}, Exception("connection refused"))
        return "recorded"

    w = Watcher(folder, take, pattern=r"^(?P<serial>W-\d+)_", settle_s=0.0)
    with held.open("rb") as writer:
        fcntl.flock(writer, fcntl.LOCK_EX)  # the station's software still has it
        w.poll()
        (item,) = w.poll()
        assert item[:2] == ("W-0001_a.npz", "waiting") and "connection refused" in item[2]
        assert f.exists() and held.exists()
        with pytest.raises(ShopdbError, match="not taken"):
            w.run(once=True, report=lambda item: None)
        down[0] = False
        assert [i[:2] for i in w.poll()] == [("W-0001_a.npz", "done")]
    assert [i[:2] for i in w.poll()] == [("W-0002_b.npz", "done")]  # once it is let go


def test_watch_takes_again_a_file_that_changed_while_it_was_read(tmp_path):
    folder = tmp_path / "bench"
    folder.mkdir()
    f = folder / "W-0001_a.csv"
    f.write_text("1,2\n")
    calls = []

    def take(path, serial):
        calls.append(path.name)
        if len(calls) == 1:
            with path.open("a") as fh:
                fh.write("3,4\n")  # the station writes on after a pause longer than the settle
            raise ShopdbError(f"{path.name}: ragged rows")
        return "recorded"

    w = Watcher(folder, take, pattern=r"^(?P<serial>W-\d+)_", settle_s=0.0)
    w.poll()
    assert w.poll() == [] and f.exists() and not any((folder / "rejected").iterdir())
    w.poll()
    assert [i[:2] for i in w.poll()] == [("W-0001_a.csv", "done")]


def test_a_watcher_without_the_ingest_right_touches_nothing(shop, admin, world, tmp_path):
    from shopdb.errors import PermissionDenied
    from shopdb.services.users import add_user
    from shopdb.services.watch import watcher_for

    folder = tmp_path / "bench"
    folder.mkdir()
    (folder / "W-0001_a.npz").write_bytes(b"1")
    with shop.write() as session:
        manager = add_user(
            session=session,
            actor=admin,
            username="boss",
            display_name="Pat Manager",
            role="manager",
            password="manager-password-1",
        )
    with pytest.raises(PermissionDenied):
        watcher_for(shop=shop, actor=manager, folder=folder, station="Bench 1")
    assert sorted(p.name for p in folder.iterdir()) == ["W-0001_a.npz"]  # no done/, rejected/
