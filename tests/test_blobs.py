"""Content-addressed height-map store and `shopdb check`."""

from __future__ import annotations

import hashlib
import io
import os
import time

import numpy as np
import pytest
import zstandard

from shopdb.blobs import BlobStore
from shopdb.errors import ShopdbError
from shopdb.models import Drawing, Measurement, Part, Station, utcnow
from shopdb.services.health import check

RNG = np.random.default_rng(20261201)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_round_trip_keeps_dtype_shape_and_nan(tmp_path, dtype):
    store = BlobStore(tmp_path)
    a = RNG.normal(size=(37, 53)).astype(dtype)
    a[3, 4] = np.nan
    key = store.put(a)
    b = store.get(key)
    assert b.dtype == dtype and b.shape == a.shape
    np.testing.assert_array_equal(a, b)
    assert store.put(a.copy()) == key  # content-addressed: same map, same key
    assert list(store.keys()) == [key]


def test_staged_blob_is_invisible_until_put_and_discard_leaves_nothing(tmp_path):
    """A staged map is a temporary file only: not a key until put moves it in; discarded, no
    file remains (common practice: write, fsync, rename for an atomic file)."""
    store = BlobStore(tmp_path)
    a, b = RNG.normal(size=(6, 7)), RNG.normal(size=(6, 7))
    staged = store.stage(a)
    assert list(store.keys()) == [] and len(store.stray_temp_files()) == 1
    key = store.put(staged)
    assert list(store.keys()) == [key] and store.stray_temp_files() == []
    np.testing.assert_array_equal(store.get(key), a)
    gone = store.stage(b)
    gone.discard()
    assert list(store.keys()) == [key] and store.stray_temp_files() == []
    with pytest.raises(ShopdbError, match="discarded before it was stored"):
        store.put(gone)  # never a key without its blob
    again = store.stage(a)  # already stored: nothing is written
    assert again.tmp is None and store.put(again) == key


def test_blob_layout_is_npy_header_and_shuffled_bytes(tmp_path):
    """An outside tool can read a blob: zstd-decompress, keep the .npy header, un-shuffle the bytes
    (byte j of element i at j * count + i), and numpy reads it (numpy .npy format spec)."""
    store = BlobStore(tmp_path)
    a = RNG.normal(size=(8, 9)).astype(np.float32)
    key = store.put(a)
    stored = zstandard.ZstdDecompressor().decompress(store.path(key).read_bytes())
    npy = io.BytesIO()
    np.save(npy, a)
    npy = npy.getvalue()
    h = len(npy) - a.nbytes
    assert stored[:h] == npy[:h]
    body = np.frombuffer(stored[h:], np.uint8).reshape(4, -1).T.tobytes()
    assert hashlib.sha256(stored[:h] + body).hexdigest() == key
    np.testing.assert_array_equal(np.load(io.BytesIO(stored[:h] + body)), a)


def test_bad_arrays_are_refused(tmp_path):
    store = BlobStore(tmp_path)
    with pytest.raises(ShopdbError, match="2-D float32/float64"):
        store.put(np.zeros((3, 3), dtype=np.int32))
    with pytest.raises(ShopdbError, match="2-D"):
        store.put(np.zeros(5))
    assert list(store.keys()) == []


def test_verify_detects_corruption(tmp_path):
    store = BlobStore(tmp_path)
    key = store.put(RNG.normal(size=(16, 16)))
    assert store.verify(key) is None
    data = zstandard.ZstdDecompressor().decompress(store.path(key).read_bytes())
    tampered = data[:-8] + b"\x01" * 8
    store.path(key).write_bytes(zstandard.ZstdCompressor().compress(tampered))
    assert store.verify(key) == "content does not match its key"
    store.path(key).write_bytes(b"not zstd")
    assert "unreadable" in store.verify(key)


def _measurement(session, key: str, sha: str) -> None:
    d = Drawing(
        number=f"D-{sha[:4]}",
        revision="A",
        surface_form_callout="3/1(0.5)",
        test_wavelength_nm=632.8,
        clear_aperture_mm=90,
    )
    session.add(d)
    session.flush()
    p = Part(serial=f"S-{sha[:4]}", drawing_id=d.id)
    s = Station(name=f"ST-{sha[:4]}", wavelength_nm=632.8)
    session.add_all([p, s])
    session.flush()
    session.add(
        Measurement(
            part_id=p.id,
            station_id=s.id,
            measured_at=utcnow(),
            wavelength_nm=632.8,
            dx_mm=0.1,
            source_sha256=sha,
            blob_key=key,
        )
    )


def test_check_reports_missing_and_orphans_and_fix_removes_old_orphans(shop):
    used = shop.blobs.put(RNG.normal(size=(8, 8)))
    orphan = shop.blobs.put(RNG.normal(size=(8, 8)))
    fresh_orphan = shop.blobs.put(RNG.normal(size=(9, 9)))
    old = time.time() - 3600
    os.utime(shop.blobs.path(orphan), (old, old))
    with shop.write() as session:
        _measurement(session, used, "a" * 64)
        _measurement(session, "b" * 64, "c" * 64)  # its blob was never written
    with shop.read() as session:
        report = check(shop=shop)
    assert report.missing == ["b" * 64]
    assert sorted(report.orphans) == sorted([orphan, fresh_orphan])
    assert not report.healthy
    with shop.read() as session:
        report = check(shop=shop, fix=True)
    assert report.removed == [orphan]  # the fresh one may belong to an ingest in flight
    assert (
        not shop.blobs.exists(orphan)
        and shop.blobs.exists(fresh_orphan)
        and shop.blobs.exists(used)
    )


def _old_orphan(shop) -> str:
    key = shop.blobs.put(RNG.normal(size=(8, 8)))
    old = time.time() - 3600
    os.utime(shop.blobs.path(key), (old, old))
    return key


def test_fix_keeps_an_orphan_a_new_measurement_took_after_the_listing(shop, monkeypatch):
    """`check --fix` lists orphans, verifies every blob (seconds on a real shop) and then
    deletes: a re-ingest that reuses the orphan's blob and commits in that window keeps its
    map (the reference is checked again at delete time)."""
    from shopdb.services.health import guard_blob_references

    orphan = _old_orphan(shop)
    with shop.write() as session:  # a referenced blob, verified after the listing
        _measurement(session, shop.blobs.put(RNG.normal(size=(8, 8))), "f" * 64)
    real_verify, taken = shop.blobs.verify, []

    def verify_while_an_ingest_commits(key):
        if not taken:
            with shop.write() as session:
                guard_blob_references(session)
                _measurement(session, orphan, "d" * 64)
            taken.append(key)
        return real_verify(key)

    monkeypatch.setattr(shop.blobs, "verify", verify_while_an_ingest_commits)
    report = check(shop=shop, fix=True)
    assert taken and report.orphans == [orphan] and report.removed == []
    assert shop.blobs.verify(orphan) is None


def test_orphan_removal_waits_for_an_ingest_in_flight(shop):
    """An ingest that has written (or reused) a blob and not yet committed its row holds the
    lock orphan removal takes: the removal waits, then sees the row and keeps the blob (on
    PostgreSQL a row uncommitted is invisible to another transaction, so only the lock can
    protect it)."""
    import threading

    from shopdb.services.health import _remove_orphan, guard_blob_references

    orphan = _old_orphan(shop)
    flushed, result = threading.Event(), {}

    def ingest():
        with shop.write() as session:
            guard_blob_references(session)
            _measurement(session, orphan, "e" * 64)
            session.flush()
            flushed.set()
            time.sleep(0.5)  # the remover starts meanwhile

    def remove():
        flushed.wait(10)
        result["removed"] = _remove_orphan(shop, orphan)

    threads = [threading.Thread(target=ingest), threading.Thread(target=remove)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(30)
    assert result == {"removed": False} and shop.blobs.verify(orphan) is None


def test_check_reports_a_blob_it_cannot_read_and_goes_on(shop, monkeypatch):
    """Blobs are created 0600; in a folder written by several station accounts another account
    cannot read them. `check` names such a blob (not a traceback) and checks the rest."""
    from pathlib import Path

    unreadable = shop.blobs.put(RNG.normal(size=(8, 8)))
    fine = shop.blobs.put(RNG.normal(size=(8, 9)))
    with shop.write() as session:
        _measurement(session, unreadable, "1" * 64)
        _measurement(session, fine, "2" * 64)
    real = Path.read_bytes

    def read_bytes(self):
        if self.name.startswith(unreadable):
            raise PermissionError(13, "Permission denied", str(self))
        return real(self)

    monkeypatch.setattr(Path, "read_bytes", read_bytes)  # root reads any file, so simulated
    report = check(shop=shop)
    assert report.corrupt == [unreadable] and report.missing == [] and not report.healthy
    assert shop.blobs.verify(unreadable) == f"blob {unreadable} cannot be read: Permission denied"
    assert shop.blobs.verify(fine) is None
