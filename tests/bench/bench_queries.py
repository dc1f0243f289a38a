"""Query speed with 100,000 measurements and results (run by hand):

    python tests/bench/bench_queries.py [--pg ADMIN_URL] [--n 100000]

Rows are bulk-inserted directly (no maps): one drawing of interest among four, 20 k parts over two
years, 66 Zernike terms per result. Times the data behind one control chart (one metric, one
drawing, 2 years), one per-term Zernike chart, KPIs by month for 2 years, and a part's convergence.
"""

from __future__ import annotations

import argparse
import json
import statistics
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import sqlalchemy as sa

from shopdb.db import make_engine, migrate, read_session
from shopdb.services import verdict
from shopdb.services.reads import charts as q
from shopdb.services.reads import kpi as kq
from shopdb.spec import parse
from shopdb.surface.settings import AnalysisSettings
from shopdb.surface.zernike import ansi_to_nm


def populate(url: str, n: int) -> None:
    migrate(url)
    eng = make_engine(url)
    rng = np.random.default_rng(0)
    t0 = datetime(2025, 1, 1, tzinfo=UTC)
    now = datetime.now(UTC)
    n_parts = n // 5
    with eng.begin() as c:
        for i, num in enumerate(["B-100", "B-150", "B-050", "B-200"]):
            c.execute(
                sa.text(
                    "INSERT INTO drawing (id, number, revision, title, surface_form_callout, test_wavelength_nm,"
                    " clear_aperture_mm, min_valid_fraction, created_at) VALUES (:i, :n, 'A', '', :c, 632.8, 90, 0.95, :t)"
                ),
                {"i": i + 1, "n": num, "c": "3/0.5(0.1); λ = 632.8 nm", "t": now},
            )
        c.execute(
            sa.text(
                "INSERT INTO station (id, name, instrument, wavelength_nm, requires_reference, profile, created_at)"
                " VALUES (1, 'S1', '', 632.8, false, '{}', :t)"
            ),
            {"t": now},
        )
        c.execute(
            sa.text(
                "INSERT INTO machine (id, name, kind, notes, created_at) VALUES (1,'M1','','',:t),(2,'M2','','',:t)"
            ),
            {"t": now},
        )
        c.execute(
            sa.text(
                "INSERT INTO part (id, serial, drawing_id, status, created_at) VALUES (:i, :s, :d, :st, :t)"
            ),
            [
                {"i": p + 1, "s": f"P{p:06d}", "d": p % 4 + 1, "st": "passed", "t": now}
                for p in range(n_parts)
            ],
        )
        runs, meas, res, terms = [], [], [], []
        for k in range(n):
            part = k % n_parts + 1
            it = k // n_parts + 1
            when = t0 + timedelta(minutes=int(k * (730 * 1440) / n))
            runs.append({"i": k + 1, "p": part, "it": it, "m": part % 2 + 1, "t": when})
            meas.append(
                {"i": k + 1, "p": part, "r": k + 1, "t": when, "sha": f"{k:064x}", "b": f"{k:064x}"}
            )
            res.append(
                {
                    "i": k + 1,
                    "m": k + 1,
                    "pv": float(rng.gamma(4, 10)),
                    "rms": float(rng.gamma(4, 2)),
                    "irr": float(rng.gamma(4, 5)),
                    "sag": float(rng.normal(0, 50)),
                    "t": now,
                }
            )
            for j in range(66):
                nn, mm = ansi_to_nm(j)
                terms.append({"r": k + 1, "n": nn, "m": mm, "c": float(rng.normal(0, 5))})
        c.execute(
            sa.text(
                "INSERT INTO polishing_run (id, part_id, iteration, machine_id, started_at, params) "
                "VALUES (:i, :p, :it, :m, :t, '{}')"
            ),
            runs,
        )
        c.execute(
            sa.text(
                "INSERT INTO measurement (id, part_id, run_id, station_id, measured_at, wavelength_nm, dx_mm, kind,"
                " source_name, source_sha256, blob_key, status, created_at) VALUES (:i, :p, :r, 1, :t, 632.8, 0.1,"
                " 'surface', '', :sha, :b, 'valid', :t)"
            ),
            meas,
        )
        c.execute(
            sa.text(
                "INSERT INTO surface_result (id, measurement_id, settings_hash, settings, software_version, pv_nm,"
                " rms_nm, irregularity_nm, sag_nm, rsi_nm, valid_fraction, psd_bands, created_at) VALUES"
                " (:i, :m, 'h', '{}', '1', :pv, :rms, :irr, :sag, 1.0, 0.99, '[]', :t)"
            ),
            res,
        )
        c.execute(
            sa.text("INSERT INTO zernike_term (result_id, n, m, coef_nm) VALUES (:r, :n, :m, :c)"),
            terms,
        )
        # the verdict owner's judgement of each result, as ingest stores it
        callout = parse("3/0.5(0.1); λ = 632.8 nm")
        outcomes = []
        for r in res:
            conf = verdict.judge_map(
                {"sag_nm": r["sag"], "irregularity_nm": r["irr"], "valid_fraction": 0.99},
                callout,
                surface=None,
                settings=AnalysisSettings(),
                clear_aperture_mm=90.0,
                min_valid_fraction=0.95,
            )
            outcomes.append(
                {
                    "r": r["i"],
                    "d": (r["m"] - 1) % n_parts % 4 + 1,
                    "c": conf.conforms,
                    "p": conf.passes,
                    "f": ",".join(conf.failed),
                    "j": json.dumps([f.as_dict() for f in conf.fields]),
                    "t": now,
                }
            )
        c.execute(
            sa.text(
                "INSERT INTO callout_outcome (result_id, drawing_id, conforms, passes, failed_fields,"
                " fields, test_field, blockers, created_at) VALUES (:r, :d, :c, :p, :f, :j, NULL,"
                " '[]', :t)"
            ),
            outcomes,
        )
    # statistics and the visibility map, as autovacuum / a shop's maintenance would keep them
    with eng.connect().execution_options(isolation_level="AUTOCOMMIT") as c:
        c.exec_driver_sql("VACUUM ANALYZE" if eng.dialect.name == "postgresql" else "ANALYZE")
    eng.dispose()


def timed(fn, repeat: int = 5) -> float:
    fn()
    out = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t)
    return statistics.median(out) * 1000


def bench(url: str, label: str) -> None:
    eng = make_engine(url)
    start = datetime(2025, 1, 1, tzinfo=UTC)
    end = start + timedelta(days=730)
    with read_session(eng) as s:
        chart = timed(
            lambda: q.metric_frame(
                session=s, metric="irregularity_nm", drawing="B-100", start=start, end=end
            )
        )
        full = timed(
            lambda: q.control_chart(
                session=s, metric="irregularity_nm", drawing="B-100", by="machine"
            ),
            3,
        )
        term = timed(
            lambda: q.metric_frame(session=s, metric="z:2,2", drawing="B-100", start=start, end=end)
        )
        conv = timed(lambda: q.part_convergence(session=s, serial="P000123"))
        kpi = timed(lambda: kq.kpi_table(session=s, start=start, end=end, by="month"), 1)
    eng.dispose()
    print(
        f"{label}: chart data {chart:.0f} ms (with limits and rules {full:.0f} ms), Zernike term chart {term:.0f} ms, "
        f"convergence {conv:.0f} ms, KPIs by month {kpi:.0f} ms"
    )


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--pg")
    ap.add_argument("--n", type=int, default=100_000)
    a = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        url = f"sqlite:///{Path(tmp) / 'q.sqlite3'}"
        t = time.perf_counter()
        populate(url, a.n)
        print(f"sqlite populated with {a.n} measurements in {time.perf_counter() - t:.0f} s")
        bench(url, "sqlite")
    if a.pg:
        name = f"shopdb_qbench_{int(time.time())}"
        admin = sa.create_engine(a.pg, isolation_level="AUTOCOMMIT")
        with admin.connect() as c:
            c.exec_driver_sql(f'CREATE DATABASE "{name}"')
        url = sa.engine.make_url(a.pg).set(database=name).render_as_string(False)
        try:
            populate(url, a.n)
            bench(url, "postgresql")
        finally:
            with admin.connect() as c:
                c.exec_driver_sql(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


if __name__ == "__main__":
    main()
