"""Ingest throughput, end to end (read, analyse, compress, store): run by hand.

    python tests/bench/bench_ingest.py [--pg URL] [--n512 1000] [--n1024 100] [--suffix x3p|tif|h5|npz]

Maps are written as X3P files first (not timed); the analysis cache is warmed with one map of
each grid. Files are taken as `shopdb ingest` takes a batch (the next one read in a background
thread). Reports maps per second and the split of the time (read / analyse / blob / rows); the
profile sees only the main thread, so the read shows as the wait for it, if any.
"""

from __future__ import annotations

import argparse
import cProfile
import pstats
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import sqlalchemy as sa

from shopdb.blobs import BlobStore
from shopdb.db import make_engine, migrate, write_session
from shopdb.formats import write_map
from shopdb.seed_demo.factories import basic_shop, disk_map
from shopdb.services.ingest import ingest, read_ahead, read_measurement
from shopdb.services.users import add_user


def make_files(folder: Path, n: int, npix: int, suffix: str = "x3p") -> list[Path]:
    rng = np.random.default_rng(npix)
    base = disk_map({(2, 0): 40.0, (2, 2): 10.0, (3, 1): 4.0}, npix=npix, fill=0.98)
    out = []
    for i in range(n):
        h = base.height_nm + rng.normal(0, 0.5, base.shape)
        h[rng.random(base.shape) < 0.01] = np.nan
        p = folder / f"m{npix}_{i:04d}.{suffix}"
        write_map(p, type(base)(h, base.dx_mm, base.wavelength_nm))
        out.append(p)
    return out


def run(url: str, blob_dir: Path, files: list[Path], label: str) -> None:
    engine = make_engine(url)
    blobs = BlobStore(blob_dir)
    with write_session(engine) as s:
        from sqlmodel import select

        from shopdb.models import Station, User

        admin = s.exec(select(User).where(User.username == "admin")).first()
        station = s.exec(select(Station).where(Station.name == "Bench 1")).first()
    when = datetime(2026, 2, 1, tzinfo=UTC)

    def batch(paths):
        """As `shopdb ingest` does: the next file is read while the current one is ingested."""
        for p, prefetched in read_ahead(paths, station, blobs=blobs):
            with write_session(engine) as s:
                ingest(
                    session=s,
                    blobs=blobs,
                    actor=admin,
                    path=p,
                    part_serial="W-0001",
                    station_name="Bench 1",
                    measured_at=when,
                    prefetched=prefetched(),
                )

    batch(files[:1])  # warm the analysis cache for this grid
    prof = cProfile.Profile()
    t = time.perf_counter()
    prof.enable()
    batch(files[1:])
    prof.disable()
    dt = time.perf_counter() - t
    n = len(files) - 1
    print(f"{label}: {n} maps in {dt:.1f} s = {n / dt:.1f} maps/s")
    st = pstats.Stats(prof)
    wanted = {
        ("ingest.py", "ingest"): "ingest, main thread",
        ("analysis.py", "analyze"): "  analyse",
        ("blobs.py", "put"): "  blob write + fsync",
        ("ingest.py", "store_result"): "  result rows",
        ("orm/session.py", "commit"): "  commit",
        ("_base.py", "result"): "  waiting for the read-ahead",
    }
    spent = {
        key: ct
        for (file, _line, func), (_cc, _nc, _tt, ct, _callers) in st.stats.items()
        for key in wanted
        if func == key[1] and file.endswith(key[0])
    }
    for key, text in wanted.items():
        if key in spent:
            print(f"    {text:30s} {spent[key] / n * 1000:7.1f} ms/map")
    # the read-ahead thread's work per file (not seen by the profile), timed alone on a few files
    reads = [time.perf_counter()]
    for p in files[1:11]:
        read_measurement(p, station)
        reads.append(time.perf_counter())
    per = (reads[-1] - reads[0]) / (len(reads) - 1) * 1000
    print(f"    {'read-ahead (SHA, read, encode)':30s} {per:7.1f} ms/map, run alone")
    engine.dispose()


def setup(url: str) -> None:
    migrate(url)
    engine = make_engine(url)
    with write_session(engine) as s:
        admin = add_user(
            session=s,
            actor=None,
            username="admin",
            display_name="A",
            role="admin",
            password="bench-password-1",
        )
        basic_shop(s, admin, calibrated_at=datetime(2026, 1, 1, tzinfo=UTC), valid_days=365)
    engine.dispose()


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--pg", help="PostgreSQL admin URL (a scratch database is created and dropped)")
    ap.add_argument("--n512", type=int, default=1000)
    ap.add_argument("--n1024", type=int, default=100)
    ap.add_argument(
        "--suffix",
        default="x3p",
        choices=["x3p", "tif", "h5", "npz"],
        help="file format of the maps (X3P: deflated and MD5-checked; TIFF: raw float32)",
    )
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        (tmp / "maps").mkdir()
        f512 = make_files(tmp / "maps", args.n512, 512, args.suffix)
        f1024 = make_files(tmp / "maps", args.n1024, 1024, args.suffix)
        targets = [("sqlite", f"sqlite:///{tmp / 'bench.sqlite3'}")]
        pg_name = None
        if args.pg:
            pg_name = f"shopdb_bench_{int(time.time())}"
            admin = sa.create_engine(args.pg, isolation_level="AUTOCOMMIT")
            with admin.connect() as c:
                c.exec_driver_sql(f'CREATE DATABASE "{pg_name}"')
            targets.append(
                (
                    "postgresql",
                    sa.engine.make_url(args.pg).set(database=pg_name).render_as_string(False),
                )
            )
        try:
            for name, url in targets:
                setup(url)
                run(url, tmp / f"blobs-{name}", f512, f"{name} 512x512")
                run(url, tmp / f"blobs-{name}", f1024, f"{name} 1024x1024")
        finally:
            if pg_name:
                with admin.connect() as c:
                    c.exec_driver_sql(f'DROP DATABASE IF EXISTS "{pg_name}" WITH (FORCE)')


if __name__ == "__main__":
    main()
