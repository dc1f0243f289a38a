"""Three-flat calibration into audited calibration records, and gage R&R from a study file."""

from __future__ import annotations

import numpy as np
import pytest
import sqlalchemy as sa
from sqlmodel import select

from shopdb import models as m
from shopdb.errors import PermissionDenied, ShopdbError
from shopdb.formats import write_map
from shopdb.services import masterdata as md
from shopdb.services import metrology
from shopdb.services.users import add_user

from ..surface.test_flats import _maps, _projection
from ..test_cli import run


@pytest.fixture
def lab(shop, admin, tmp_path):
    with shop.write() as s:
        for name in ("TF-1", "TF-2", "TF-3"):
            md.add_reference(session=s, actor=admin, name=name, diameter_mm=100.0)
        add_user(
            session=s,
            actor=admin,
            username="metro",
            display_name="Metro Person",
            role="metrology",
            password="metrology-pass-1",
        )
        add_user(
            session=s,
            actor=admin,
            username="op",
            display_name="Op Person",
            role="operator",
            password="operator-pass-12",
        )
    files = {}
    for key, maps in _maps().items():
        files[key] = []
        for i, mp in enumerate(maps):
            path = tmp_path / f"{key}-{i}.npz"
            write_map(path, mp)
            files[key].append(path)
    return files


def _user(shop, name):
    from shopdb.services.users import get_user

    with shop.read() as s:
        return get_user(session=s, username=name)


def test_three_flat_records_one_audited_calibration_per_flat(shop, lab):
    with shop.write() as s:
        cals, sol = metrology.calibrate_three_flat(
            session=s,
            blobs=shop.blobs,
            actor=_user(shop, "metro"),
            files=lab,
            references=["TF-1", "TF-2", "TF-3"],
        )
    with shop.read() as s:
        rows = s.exec(select(m.ReferenceCalibration).order_by(m.ReferenceCalibration.id)).all()
        events = s.exec(
            select(m.AuditEvent).where(m.AuditEvent.table_name == "reference_calibration")
        ).all()
    assert len(rows) == 3 and len(events) == 3
    for flat, row in zip("ABC", rows, strict=True):
        truth = _projection(flat, sol.radius_mm)
        for i, t in enumerate(sol.terms):
            key = f"{t[0]},{t[1]}"
            if t in sol.undetermined:
                assert key not in row.coefficients and key in row.details["undetermined"]
            else:
                u = row.details["uncertainty_nm"][key]
                assert abs(row.coefficients[key] - truth[i]) < 5 * u
        assert row.method.startswith("three-flat") and row.uncertainty_nm > 0
        err = shop.blobs.get(row.error_map_blob)
        assert err.shape == (128, 128) and np.isfinite(err).sum() > 10000
        assert row.details["repeatability_from"] == "residual"
    html = metrology.report_html(sol, ["TF-1", "TF-2", "TF-3"], [c.id for c in cals])
    assert html.count("<img") == 3 and "Undetermined by this measurement set" in html
    assert metrology.report_pdf(sol, ["TF-1", "TF-2", "TF-3"], [1, 2, 3]).startswith(b"%PDF")


def test_refusals_write_nothing(shop, lab):
    def count():
        with shop.engine.connect() as c:
            return c.execute(sa.text("SELECT COUNT(*) FROM reference_calibration")).scalar()

    cases = [
        ("op", {"references": ["TF-1", "TF-2", "TF-3"]}, PermissionDenied, "may not calibrate"),
        ("metro", {"references": ["TF-1", "TF-1", "TF-3"]}, ShopdbError, "three different"),
        ("metro", {"references": ["TF-1", "TF-2", "TF-9"]}, ShopdbError, "unknown reference"),
        (
            "metro",
            {"references": ["TF-1", "TF-2", "TF-3"], "files": {**lab, "ab_rot": []}},
            ShopdbError,
            "needs the measurement",
        ),
    ]
    for who, kw, exc, msg in cases:
        args = {"files": lab, **kw}
        with pytest.raises(exc, match=msg), shop.write() as s:
            metrology.calibrate_three_flat(
                session=s, blobs=shop.blobs, actor=_user(shop, who), **args
            )
    assert count() == 0
    assert not list(shop.blobs.keys())


def test_cli_three_flat_and_msa(tmp_path):
    home = tmp_path / "shop"
    assert run("init", "--home", str(home)).returncode == 0
    env = {"SHOPDB_PASSWORD": "admin-password-1", "SHOPDB_NEW_PASSWORD": "admin-password-1"}
    r = run(
        "user",
        "add",
        "admin",
        "--name",
        "Lab Admin",
        "--role",
        "admin",
        "--home",
        str(home),
        env=env,
    )
    assert r.returncode == 0, r.stderr
    for name in ("TF-1", "TF-2", "TF-3"):
        r = run(
            "add",
            "reference",
            name,
            "--diameter-mm",
            "100",
            "--home",
            str(home),
            "--as",
            "admin",
            env=env,
        )
        assert r.returncode == 0, r.stderr
    args = []
    for key, maps in _maps().items():
        path = tmp_path / f"{key}.npz"
        write_map(path, maps[0])
        args += [f"--{key.replace('_', '-')}", str(path)]
    report = tmp_path / "cal.html"
    r = run(
        "calibrate",
        "three-flat",
        *args,
        "--references",
        "TF-1,TF-2,TF-3",
        "--report",
        str(report),
        "--home",
        str(home),
        "--as",
        "admin",
        env=env,
    )
    assert r.returncode == 0, r.stderr
    assert "A = TF-1: calibration 1" in r.stdout and "undetermined" in r.stdout
    assert report.read_text().count("<img") == 3
    r = run("drift", "TF-1", "--json", "--home", str(home))
    assert r.returncode == 0, r.stderr
    import json

    drift = json.loads(r.stdout)  # the drift analytics read the new record
    assert [c["calibration_id"] for c in drift["calibrations"]] == [1]
    # a study file with an unbalanced design is refused with its name
    bad = tmp_path / "grr.csv"
    bad.write_text("part,operator,trial,value\n1,a,1,0.1\n1,a,2,0.2\n2,a,1,0.3\n")
    r = run("msa", str(bad))
    assert r.returncode == 2 and "grr.csv: the study is not balanced" in r.stderr
    from ..spc.test_msa import CUBE

    good = tmp_path / "study.csv"
    lines = ["part,operator,trial,value"]
    for o in range(3):
        for p in range(10):
            for t in range(3):
                lines.append(f"P{p},{'ABC'[o]},{t + 1},{CUBE[o, p, t]}")
    good.write_text("\n".join(lines) + "\n")
    r = run("msa", str(good), "--tolerance", "8")
    assert r.returncode == 0, r.stderr
    assert "EV 0.2019 (17.6 %), AV 0.2297 (20.0 %), GRR 0.3058 (26.7 %" in r.stdout
    assert "ndc 5: may be acceptable" in r.stdout
