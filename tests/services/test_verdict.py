"""One owner for "does this measurement meet its drawing": the part and measurement pages, the
floor's convergence, lot release and the KPIs give the same verdict, on both backends.

Test-field semantics after ISO 10110-5:2015 §4 (the tolerance applies to every area of the stated
diameter within the clear aperture). Astigmatism restricted to a concentric sub-aperture of radius
r in an aperture of radius R is astigmatism of coefficient (r / R)^2 times the whole (a change of
variables in rho^2 cos 2 theta; the tilt and defocus it also yields are removed with the
best-fit sphere), and the PV of a unit-RMS astigmatism term is 2 sqrt(6) (shared/REFERENCES.md).
"""

from __future__ import annotations

import math
import random
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from shopdb import models as m
from shopdb.formats import write_map
from shopdb.seed_demo.factories import disk_map
from shopdb.services import masterdata as md
from shopdb.services import release, verdict
from shopdb.services.ingest import ingest
from shopdb.services.lookups import CHECK_DRAWING, drawing_callout, get_by
from shopdb.services.reads import charts, kpi, pages
from shopdb.spec import evaluate, values_from_result
from shopdb.surface import subaperture
from shopdb.surface.analysis import analyze
from shopdb.surface.maps import SurfaceMap
from shopdb.surface.settings import AnalysisSettings

DAY = datetime(2026, 3, 2, 8, 0, tzinfo=UTC)
LAM = 632.8


def _shop(shop, admin, *, check_standard: bool = True) -> None:
    with shop.write() as s:
        ref = md.add_reference(session=s, actor=admin, name="TF-1", diameter_mm=150.0)
        md.add_calibration(
            session=s,
            actor=admin,
            reference_id=ref.id,
            calibrated_at=DAY - timedelta(days=10),
            valid_until=DAY + timedelta(days=80),
            method="three-flat",
            uncertainty_nm=0.5,
            coefficients={"2,0": 1.0},
        )
        chk = md.add_drawing(
            session=s,
            actor=admin,
            number=CHECK_DRAWING,
            revision="A",
            surface_form_callout="3/1(0.5); λ = 632.8 nm",
            test_wavelength_nm=LAM,
            clear_aperture_mm=90.0,
        )
        md.add_part(session=s, actor=admin, serial="CS-1", drawing_id=chk.id)
        profile = {"reference": "TF-1", "settings": {"zernike_order": 6}}
        if check_standard:
            profile |= {"check_standard": "CS-1", "check_max_age_days": 30}
        md.add_station(session=s, actor=admin, name="Bench 1", wavelength_nm=LAM, profile=profile)
        md.add_station(
            session=s,
            actor=admin,
            name="Bench 2",  # no check standard: its measurements are blocked
            wavelength_nm=LAM,
            profile={"reference": "TF-1", "settings": {"zernike_order": 6}},
        )
        md.add_machine(session=s, actor=admin, name="Lap 1")


def _measure(shop, admin, tmp_path, serial, surface, when, station="Bench 1"):
    path = tmp_path / f"{serial}-{when:%d%H%M%S}.x3p"
    write_map(path, surface)
    with shop.write() as s:
        return ingest(
            session=s,
            blobs=shop.blobs,
            actor=admin,
            path=path,
            part_serial=serial,
            station_name=station,
            measured_at=when,
        )


def _checks(shop, admin, tmp_path, n=6):
    for k in range(n):
        _measure(
            shop,
            admin,
            tmp_path,
            "CS-1",
            disk_map({(2, 0): 3.0 + 0.05 * (k % 3)}, npix=64, noise_nm=0.2),
            DAY - timedelta(days=1, hours=3 * k),
        )


@pytest.mark.slow
def test_a_test_field_callout_gives_one_verdict_everywhere(shop, admin, tmp_path):
    """The drawing 3/-(0.25); λ = 632.8 nm; Ø 30 over a 90 mm clear aperture, and a map of 40 nm
    RMS astigmatism: over the whole aperture its irregularity is 2 sqrt(6) 40 = 196 nm, far over
    the 79.1 nm limit; over any 30 mm sub-aperture it is (15/45)^2 of that, 21.8 nm, well under.
    The part page, the measurement page, the floor's convergence, release and the KPIs all say
    pass."""
    _shop(shop, admin)
    _checks(shop, admin, tmp_path)
    with shop.write() as s:
        d = md.add_drawing(
            session=s,
            actor=admin,
            number="TF-30",
            revision="A",
            surface_form_callout="3/-(0.25); λ = 632.8 nm; Ø 30",
            test_wavelength_nm=LAM,
            clear_aperture_mm=90.0,
        )
        lot = md.add_lot(session=s, actor=admin, code="L-1", drawing_id=d.id)
        md.add_part(session=s, actor=admin, serial="P-1", drawing_id=d.id, lot_id=lot.id)
        md.start_run(
            session=s, actor=admin, part_serial="P-1", machine_name="Lap 1", started_at=DAY
        )
    astig = disk_map({(2, 2): 40.0}, npix=96, diameter_mm=90.0)
    out = _measure(shop, admin, tmp_path, "P-1", astig, DAY + timedelta(hours=2))
    assert out.conformance.conforms
    (irr,) = out.conformance.fields
    assert irr.limit == pytest.approx(0.25 * LAM / 2)
    assert irr.measured == pytest.approx(2 * math.sqrt(6) * 40 / 9, rel=0.15)
    with shop.write() as s:
        md.set_part_status(session=s, actor=admin, part_serial="P-1", status="passed")
    with shop.read() as s:
        whole = s.get(m.SurfaceResult, out.result_id).irregularity_nm
        # the whole aperture fails (3 %: the pixel centres nearest the edge lie at rho^2 ~ 0.975)
        assert whole == pytest.approx(2 * math.sqrt(6) * 40, rel=0.03)
        history = pages.part_history(session=s, serial="P-1")
        detail = pages.measurement_detail(session=s, blobs=None, measurement_id=out.measurement_id)
        lot_ev = release.lot_evidence(session=s, code="L-1")
        outcomes = kpi.part_outcomes(session=s, by="drawing").set_index("part")
        conv = charts.part_convergence(session=s, serial="P-1")
    assert history["measurements"]["verdict"].tolist() == ["pass"]
    assert detail["verdict"].verdict == "pass"
    assert lot_ev["parts"][0]["verdict"] == "pass"
    assert bool(outcomes.loc["P-1", "first_pass"]) and outcomes.loc["P-1", "failed_fields"] == []
    assert conv["convergence"].status == "in tolerance"  # judged as the verdict judges it
    assert conv["per_run"]["value"].iloc[0] == pytest.approx(irr.measured)


CALLOUT_FIELDS = [
    lambda r: f"{r.uniform(20, 120):.0f} nm",  # sag
    lambda r: f"{r.uniform(5, 40):.0f} nm",  # irregularity
    lambda r: f"{r.uniform(2, 15):.0f} nm",  # rsi
]


def _random_callout(r: random.Random) -> str:
    sag = CALLOUT_FIELDS[0](r) if r.random() < 0.7 else "-"
    irr = CALLOUT_FIELDS[1](r) if r.random() < 0.8 else "-"
    rsi = f"/{CALLOUT_FIELDS[2](r)}" if r.random() < 0.4 else ""
    text = f"3/{sag}({irr}{rsi})"
    if r.random() < 0.5:
        text += f" RMS{r.choice('tia')} < {r.uniform(2, 12):.1f} nm"
    text += f"; λ = {LAM} nm"
    if r.random() < 0.4:
        text += f"; PVr < {r.uniform(20, 90):.0f} nm"
    if r.random() < 0.3:
        text += f"; slope < {r.uniform(0.5, 3):.1f} urad"
    if r.random() < 0.4:
        text += f"; band{r.choice([1, 2])} < {r.uniform(0.5, 6):.1f} nm"
    if r.random() < 0.4:
        text += f"; Ø {r.choice([30, 40, 50])}"
    return text


def _fresh_judgement(shop, me: m.Measurement, res: m.SurfaceResult, drawing, callout):
    """The callout judged from scratch on the stored map, independently of the stored outcome:
    the analysis recomputed, the test field scanned, each field compared by spec.evaluate."""
    z = shop.blobs.get(me.blob_key).astype(np.float64)
    surface = SurfaceMap(z, me.dx_mm, me.wavelength_nm)
    settings = AnalysisSettings.from_dict(res.settings)
    values = values_from_result(callout, analyze(surface, settings).stored())
    if callout.test_field_mm:
        try:
            scan = subaperture.scan(
                surface,
                settings,
                clear_aperture_mm=drawing.clear_aperture_mm,
                field_diameter_mm=callout.test_field_mm,
            )
        except ValueError:
            scan = None
        if scan is not None:
            for f in values:
                if f"{f}_nm" in scan.worst:
                    values[f] = scan.worst[f"{f}_nm"]
    return sorted(f.field for f in evaluate(callout, values) if not f.passed)


@pytest.mark.slow
def test_kpis_equal_the_verdict_owner_on_a_randomized_corpus(shop, admin, tmp_path):
    """40 parts of 12 random drawings (every callout field kind, test fields, nm limits near the
    maps' values), measured on a station with and one without a check standard, some with
    dropouts below the drawing's minimum: for every part the KPIs' failed fields and first pass
    equal the verdict owner's judgement of its final measurement, which equals the callout judged
    afresh on the stored map; blocked verdicts do not change what the KPIs count."""
    r = random.Random(20261203)
    rng = np.random.default_rng(7)
    _shop(shop, admin)
    _checks(shop, admin, tmp_path)
    with shop.write() as s:
        drawings = [
            md.add_drawing(
                session=s,
                actor=admin,
                number=f"R-{i:02d}",
                revision="A",
                surface_form_callout=_random_callout(r),
                test_wavelength_nm=LAM,
                clear_aperture_mm=90.0,
                min_valid_fraction=0.95,
            ).id
            for i in range(12)
        ]
    expected = {}
    for k in range(40):
        serial = f"Q-{k:03d}"
        with shop.write() as s:
            md.add_part(session=s, actor=admin, serial=serial, drawing_id=drawings[k % 12])
            md.start_run(
                session=s, actor=admin, part_serial=serial, machine_name="Lap 1", started_at=DAY
            )
        coefs = {
            (2, 0): rng.normal(0, 12),
            (2, 2): rng.normal(0, 6),
            (3, -1): rng.normal(0, 4),
            (4, 0): rng.normal(0, 3),
            (3, 3): rng.normal(0, 2),
        }
        surface = disk_map(coefs, npix=72, noise_nm=0.5, rng=rng)
        if r.random() < 0.2:  # too many dropouts: blocked
            h = np.where(rng.random(surface.shape) < 0.08, np.nan, surface.height_nm)
            surface = SurfaceMap(h, surface.dx_mm, surface.wavelength_nm)
        station = "Bench 2" if r.random() < 0.2 else "Bench 1"
        out = _measure(
            shop, admin, tmp_path, serial, surface, DAY + timedelta(hours=1 + k), station
        )
        with shop.write() as s:
            md.set_part_status(session=s, actor=admin, part_serial=serial, status="passed")
        expected[serial] = out.measurement_id
    with shop.read() as s:
        outcomes = kpi.part_outcomes(session=s, by="drawing").set_index("part")
        kinds = set()
        blocked = 0
        for serial, mid in expected.items():
            part = get_by(s, m.Part, "serial", serial, "part")
            v = verdict.part_verdict(s, part)
            assert v.measurement_id == mid
            me = s.get(m.Measurement, mid)
            res = s.get(m.SurfaceResult, v.result_id)
            drawing, callout = drawing_callout(s, part.drawing_id)
            fresh = _fresh_judgement(shop, me, res, drawing, callout)
            assert sorted(v.failed) == fresh, (serial, callout.text)
            assert sorted(outcomes.loc[serial, "failed_fields"]) == fresh, serial
            map_blocked = res.valid_fraction < drawing.min_valid_fraction
            assert bool(outcomes.loc[serial, "first_pass"]) == (not fresh and not map_blocked)
            kinds |= {f.field.rstrip("0123456789") for f in v.fields}
            kinds |= {"test field"} if v.test_field else set()
            blocked += v.verdict == "blocked"
    # the corpus covers what it claims to
    assert kinds >= {"sag", "irregularity", "rsi", "pvr", "slope", "band", "test field"}
    assert kinds & {"rmst", "rmsi", "rmsa"}
    assert blocked >= 3
    assert 0 < outcomes["first_pass"].sum() < len(outcomes)
