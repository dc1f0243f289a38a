"""Every verdict carries the uncertainty of each field (GUM, k = 2), its zone and the drawing's
decision rule; the budget names each contribution with its source record; a signature freezes
U and the rule. Both backends."""

from __future__ import annotations

import math
import zlib
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from shopdb.errors import ShopdbError
from shopdb.formats import write_map
from shopdb.models import Part
from shopdb.seed_demo.factories import disk_map
from shopdb.services import masterdata as md
from shopdb.services import release, verdict
from shopdb.services.ingest import ingest
from shopdb.services.lookups import CHECK_DRAWING, get_by
from shopdb.services.metrology import gage_study, record_gage_study
from shopdb.services.reads import kpi
from shopdb.services.users import add_user, get_user
from shopdb.spc import decision
from shopdb.spc.constants import d2

DAY = datetime(2026, 5, 4, 8, 0, tzinfo=UTC)
LAM = 632.8
PW = "qa-password-123"
CHECKS = [3.00, 3.30, 2.90, 3.20, 3.05, 3.25]  # the check standard's sagitta / 2 sqrt(3)


def _measure(shop, tmp_path, serial, coefs, when, by="admin", noise=0.2):
    path = tmp_path / f"{serial}-{when:%m%d%H%M%S}.x3p"
    write_map(
        path,
        disk_map(
            coefs,
            npix=64,
            noise_nm=noise,
            rng=np.random.default_rng(zlib.crc32(path.name.encode())),
        ),
    )
    with shop.write() as s:
        return ingest(
            session=s,
            blobs=shop.blobs,
            actor=get_user(session=s, username=by),
            path=path,
            part_serial=serial,
            station_name="Bench 1",
            measured_at=when,
        )


@pytest.fixture
def lab(shop, admin, tmp_path):
    """A bench with its check standard, a reference with three calibrations whose power drifts
    by 1 nm a month (per-term uncertainties, as a three-flat record carries them), and two
    drawings of the same callout, one judged by simple acceptance, one by guarded acceptance."""
    with shop.write() as s:
        add_user(
            session=s, actor=admin, username="qa1", display_name="Q One", role="qa", password=PW
        )
        add_user(
            session=s, actor=admin, username="qa2", display_name="Q Two", role="qa", password=PW
        )
        ref = md.add_reference(session=s, actor=admin, name="TF-1", diameter_mm=150.0)
        for k in range(3):
            at = DAY - timedelta(days=30.44 * (3 - k))
            md.add_calibration(
                session=s,
                actor=admin,
                reference_id=ref.id,
                calibrated_at=at,
                valid_until=at + timedelta(days=120),
                method="three-flat",
                uncertainty_nm=0.5,
                coefficients={"2,0": 1.0 + k, "2,2": 0.5},
                details={"uncertainty_nm": {"2,0": 0.2, "2,2": 0.3, "3,1": 0.25, "4,0": 0.2}},
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
        md.add_station(
            session=s,
            actor=admin,
            name="Bench 1",
            wavelength_nm=LAM,
            profile={"reference": "TF-1", "check_standard": "CS-1", "check_max_age_days": 30},
        )
        for rule in ("simple", "strict"):
            d = md.add_drawing(
                session=s,
                actor=admin,
                number=f"W-{rule}",
                revision="A",
                surface_form_callout="3/0.5(0.1); λ = 632.8 nm",
                test_wavelength_nm=LAM,
                clear_aperture_mm=90.0,
                decision_rule=rule,
            )
            lot = md.add_lot(session=s, actor=admin, code=f"L-{rule}", drawing_id=d.id)
            md.add_part(session=s, actor=admin, serial=f"P-{rule}", drawing_id=d.id, lot_id=lot.id)
    for k, c in enumerate(CHECKS):
        _measure(shop, tmp_path, "CS-1", {(2, 0): c}, DAY - timedelta(days=3, hours=-k), noise=0.02)
    return shop


def test_every_field_carries_its_budget_with_named_sources(lab, tmp_path):
    """(a) the check standard's repeatability: MR-bar / d2(2) of its sagitta (NIST/SEMATECH
    e-Handbook §6.3.2.2); (b) the reference's per-term uncertainty, 2 sqrt(3) u(2,0) on the
    sagitta (shopdb.surface.sensitivity); (d) the predicted power drift since the last
    calibration, a rectangular contribution of half-width 2 sqrt(3) |dc(2,0)| (JCGM 100 §4.3.7);
    combined in quadrature and expanded with k = 2 (JCGM 100 §5.1.2, §6.2)."""
    out = _measure(lab, tmp_path, "P-simple", {(2, 0): 20.0, (2, 2): 3.0}, DAY + timedelta(hours=2))
    sag = next(f for f in out.conformance.fields if f.field == "sag")
    names = {c.name: c for c in sag.budget.contributions}
    assert set(names) == {"repeatability", "reference calibration", "reference drift"}
    checks_sag = 2 * math.sqrt(3) * np.asarray(CHECKS)
    rep = np.abs(np.diff(checks_sag)).mean() / d2(2)
    assert names["repeatability"].u == pytest.approx(rep, rel=0.05)  # maps carry a little noise
    assert (
        names["repeatability"].type == "A"
        and "check standard CS-1" in names["repeatability"].source
    )
    assert names["reference calibration"].u == pytest.approx(2 * math.sqrt(3) * 0.2)
    assert "TF-1 calibration 3" in names["reference calibration"].source
    drift = names["reference drift"]
    # the power grows 1 nm per 30.44 days; 30.44 days + 2 h after the last calibration
    assert drift.distribution == "rectangular"
    assert drift.u == pytest.approx(
        2 * math.sqrt(3) * (1 + 2 / 24 / 30.44) / math.sqrt(3), rel=0.01
    )
    assert sag.budget.k == 2
    assert sag.U == pytest.approx(2 * math.sqrt(sum(c.u**2 for c in names.values())))
    irr = next(f for f in out.conformance.fields if f.field == "irregularity")
    assert {c.name for c in irr.budget.contributions} == {"repeatability", "reference calibration"}
    assert irr.zone in (
        decision.CONFORMANCE_PROVEN,
        decision.UNCERTAINTY_RANGE,
        decision.NONCONFORMANCE_PROVEN,
    )


def test_a_gage_study_enters_the_budgets_measured_after_it(lab, tmp_path):
    """(c) reproducibility: the appraiser variation of the latest gage R&R study of the quantity
    (AIAG MSA 4th ed. III-B, ANOVA), for measurements taken after the study only."""
    from ..spc.test_msa import CUBE

    lines = ["part,operator,trial,value"]
    for o in range(3):
        for p in range(10):
            for t in range(3):
                lines.append(f"P{p},{'ABC'[o]},{t + 1},{CUBE[o, p, t]}")
    study = gage_study("\n".join(lines).encode(), name="grr.csv")
    with lab.write() as s:
        row = record_gage_study(
            session=s,
            actor=get_user(session=s, username="admin"),
            study=study,
            station="Bench 1",
            quantity="irregularity_nm",
            studied_at=DAY + timedelta(days=1),
        )
        studied = row.studied_at
    before = _measure(lab, tmp_path, "P-simple", {(2, 0): 20.0}, studied - timedelta(hours=1))
    after = _measure(lab, tmp_path, "P-strict", {(2, 0): 20.0}, studied + timedelta(hours=1))

    def names(out):
        irr = next(f for f in out.conformance.fields if f.field == "irregularity")
        return {c.name: c for c in irr.budget.contributions}

    assert "reproducibility" not in names(before)
    rep = names(after)["reproducibility"]
    anova = next(g for g in study.results if g.method.lower().startswith("anova"))
    assert rep.u == pytest.approx(math.hypot(anova.av, anova.interaction))
    assert f"gage study {row.id} of Bench 1" in rep.source


def test_guarded_acceptance_holds_a_close_call_and_the_signature_freezes_u(lab, tmp_path, tamper):
    """A part just under its irregularity limit: inside the uncertainty range. Under simple
    acceptance it passes (a conditional pass); under guarded acceptance it is not a pass, QA can
    only accept it with a deviation; the KPIs count it as conditional; the signed evidence holds
    U and the rule, so changing either breaks the signature."""
    limit = 0.1 * LAM / 2
    # a trefoil whose irregularity (PV 2 sqrt(8) c) is 0.5 nm under the limit
    c = (limit - 0.5) / (2 * math.sqrt(8))
    for rule in ("simple", "strict"):
        _measure(
            lab,
            tmp_path,
            f"P-{rule}",
            {(2, 0): 10.0, (3, 3): c},
            DAY + timedelta(hours=3),
            noise=0.05,
        )
    with lab.read() as s:
        v_simple = verdict.part_verdict(s, get_by(s, Part, "serial", "P-simple", "part"))
        v_strict = verdict.part_verdict(s, get_by(s, Part, "serial", "P-strict", "part"))
    irr_simple = next(f for f in v_simple.fields if f.field == "irregularity")
    irr_strict = next(f for f in v_strict.fields if f.field == "irregularity")
    assert (
        irr_simple.zone == decision.UNCERTAINTY_RANGE and irr_simple.outcome == "conditional pass"
    )
    assert v_simple.verdict == "pass" and v_strict.verdict == "fail"
    assert irr_strict.acceptance_limit == pytest.approx(limit - irr_strict.U)
    assert 0.5 < irr_strict.conformance_probability < 1.0
    assert any("inside the uncertainty range" in r for r in v_strict.reasons)

    def as_qa(fn, **kw):
        with lab.write() as s:
            return fn(session=s, actor=get_user(session=s, username="qa1"), **kw)

    with pytest.raises(ShopdbError, match="cannot be accepted"):
        as_qa(release.dispose, code="L-strict", serial="P-strict", decision="accept")
    as_qa(
        release.dispose,
        code="L-strict",
        serial="P-strict",
        decision="accept_deviation",
        deviation_number="DV-1",
        reason="accepted close to the limit, customer agreed",
    )
    with lab.write() as s:
        sig = release.sign(
            session=s,
            actor=get_user(session=s, username="qa1"),
            code="L-strict",
            password=PW,
            meaning="released",
        )
    with lab.read() as s:
        outcomes = kpi.part_outcomes(session=s, by="drawing")
        assert release.verify_lot(session=s, code="L-strict")[0]["ok"]
        ev = release.lot_evidence(session=s, code="L-strict")
    frozen = next(f for f in ev["parts"][0]["fields"] if f["field"] == "irregularity")
    assert frozen["U"] == pytest.approx(irr_strict.U) and frozen["rule"] == "strict"
    assert frozen["k"] == 2 and frozen["zone"] == decision.UNCERTAINTY_RANGE
    assert set(outcomes.columns) >= {"conditional"}
    assert outcomes.set_index("part").loc["P-strict", "conditional"]
    # the rule and U are evidence: editing either no longer verifies
    tamper("UPDATE drawing SET decision_rule = 'simple' WHERE number = 'W-strict'")
    with lab.read() as s:
        assert not release.verify_lot(session=s, code="L-strict")[0]["ok"]
    assert sig.evidence_sha256


def test_a_drawing_rule_is_checked_and_fixed_with_the_revision(lab):
    with pytest.raises(ShopdbError, match="decision rule 'loose'"), lab.write() as s:
        md.add_drawing(
            session=s,
            actor=get_user(session=s, username="admin"),
            number="W-x",
            revision="A",
            surface_form_callout="3/1(0.5)",
            test_wavelength_nm=LAM,
            clear_aperture_mm=50.0,
            decision_rule="loose",
        )
    from shopdb.services import settings

    with lab.write() as s:
        settings.set_value(
            session=s,
            actor=get_user(session=s, username="qa1"),
            key="decision_rule",
            value="strict:1.5",
        )
        d = md.add_drawing(
            session=s,
            actor=get_user(session=s, username="admin"),
            number="W-y",
            revision="A",
            surface_form_callout="3/1(0.5)",
            test_wavelength_nm=LAM,
            clear_aperture_mm=50.0,
        )
        assert d.decision_rule == "strict:1.5"  # the shop's default at the time
    with pytest.raises(ShopdbError, match="may not quality policy"), lab.write() as s:
        add_user(
            session=s,
            actor=get_user(session=s, username="admin"),
            username="m1",
            display_name="M",
            role="metrology",
            password=PW,
        )
        settings.set_value(
            session=s, actor=get_user(session=s, username="m1"), key="decision_rule", value="simple"
        )
