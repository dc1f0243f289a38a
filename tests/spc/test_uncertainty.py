"""Measurement uncertainty and decision rules against published examples and independent
computation: the GUM's worked example, a Monte Carlo propagation (JCGM 101), the zone boundaries
of ISO 14253-1 / ILAC-G8 at, just inside and just outside L +- U, and JCGM 106's conformance
probability by direct numerical integration with scipy."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

from shopdb.spc import decision
from shopdb.spc.decision import DecisionRule
from shopdb.spc.gum import Contribution, combine, rectangular
from shopdb.spec import evaluate, parse
from shopdb.surface import sensitivity, zernike
from shopdb.surface.analysis import analyze
from shopdb.surface.maps import SurfaceMap
from shopdb.surface.settings import AnalysisSettings

RNG = np.random.default_rng(2026)


def test_gum_end_gauge_example():
    """JCGM 100:2008 §H.1, calibration of an end gauge (Table H.1) [values from memory; checked
    for internal consistency: 9.7 nm = sqrt(5.8^2 + 3.9^2 + 6.7^2), 16.6 nm = 0.029 °C x 0.575
    um/°C]. u(l_s) = 25 nm (nu 18), u(d) = 9.7 nm (nu 25.6), u(delta alpha) term 2.9 nm (nu 50),
    u(delta theta) term 16.6 nm (nu 2): u_c = 32 nm, nu_eff = 16, U99 = t_99(16) u_c = 93 nm."""
    b = combine(
        [
            Contribution("calibration of the standard", 25.0, "B", dof=18),
            Contribution("measured difference", 9.7, "A", dof=25.6),
            Contribution("expansion coefficients", 2.9, "B", dof=50),
            Contribution("temperature difference", 16.6, "B", dof=2),
        ]
    )
    assert b.u == pytest.approx(31.7, abs=0.05)  # the GUM rounds it to 32 nm
    assert math.floor(b.dof) == 16
    assert stats.t.ppf(0.995, math.floor(b.dof)) * b.u == pytest.approx(93, abs=0.6)
    assert b.k == 2 and b.U == pytest.approx(2 * b.u)


def test_sensitivity_coefficients_and_rectangular_inputs():
    """JCGM 100:2008 §5.1.2 (c_i u_i) and §4.3.7 (a / sqrt 3)."""
    b = combine(
        [Contribution("a", 2.0, "A", sensitivity=1.5), rectangular("b", math.sqrt(3) * 4.0)]
    )
    assert b.u == pytest.approx(math.hypot(3.0, 4.0))
    assert b.dof is None  # no input has finite degrees of freedom
    with pytest.raises(ValueError, match="type must be 'A' or 'B'"):
        Contribution("x", 1.0, "C")
    with pytest.raises(ValueError, match="must be a finite number >= 0"):
        Contribution("x", -1.0, "A")


def _disk(n=97):
    y, x = np.mgrid[-1 : 1 : n * 1j, -1 : 1 : n * 1j]
    rho, theta = np.hypot(x, y), np.arctan2(y, x)
    return rho, theta, rho <= 1


@pytest.mark.parametrize("figure_nm", [40.0, 15.0])
def test_pv_linearisation_agrees_with_monte_carlo(figure_nm):
    """JCGM 101:2008 (propagation of distributions by Monte Carlo) as the check of the GUM's
    law of propagation for a non-linear quantity: the irregularity (a PV) of a part with coma
    and trefoil measured against a reference whose astigmatism, coma, trefoil and spherical
    terms each carry 0.6 nm standard uncertainty. The linearised u (sensitivities Z_j(p) -
    Z_j(v) at the analysis' peak and valley, shopdb.surface.sensitivity) matches the Monte Carlo
    standard deviation within 8 % when the part's figure dominates; the mean shift is small."""
    rho, theta, inside = _disk()
    part = figure_nm * zernike.zernike(3, 1, rho, theta) + 0.4 * figure_nm * zernike.zernike(
        3, 3, rho, theta
    )
    z = np.where(inside, part, np.nan)
    a = analyze(
        SurfaceMap(z, 0.5, 632.8, centre_rc=(48.0, 48.0), radius_px=48.0),
        AnalysisSettings(zernike_order=6),
    )
    term_u = {t: 0.6 for t in [(2, 2), (2, -2), (3, 1), (3, -1), (3, 3), (3, -3), (4, 0)]}
    u_gum = sensitivity.pv_u(sensitivity.kept("irregularity", term_u), *a.extrema["irregularity"])
    # Monte Carlo: the irregularity of part + reference error; the kept terms are orthogonal to
    # the best-fit sphere, which they do not move
    terms = list(term_u)
    zj = np.array([zernike.zernike(n, m, rho[inside], theta[inside]) for n, m in terms])
    irr0 = part[inside]
    draws = RNG.normal(0.0, 0.6, (4000, len(terms)))
    pvs = np.ptp(irr0[None, :] + draws @ zj, axis=1)
    u_mc = float(pvs.std(ddof=1))
    assert u_gum == pytest.approx(u_mc, rel=0.08)
    assert abs(pvs.mean() - np.ptp(irr0)) < 0.5 * u_mc  # the PV's bias stays under the spread
    # and the bound used where the extrema are not known covers it
    assert sensitivity.pv_u_bound(sensitivity.kept("irregularity", term_u)) >= u_mc


def test_reference_moves_the_sagitta_exactly():
    """Sagitta 2 sqrt(3) c(2,0) (shared/REFERENCES.md): linear in the defocus term, u = 2 sqrt(3)
    u(2,0), scaled (d / D)^2 over a test field."""
    assert sensitivity.reference_u("sag", {(2, 0): 0.5}) == pytest.approx(math.sqrt(3))
    assert sensitivity.reference_u("sag", {(2, 0): 0.5}, aperture_scale=0.25) == pytest.approx(
        math.sqrt(3) / 4
    )
    # RMS-type quantities: the RMS of the kept terms' uncertainty (orthonormal terms)
    term_u = {(2, 0): 0.3, (2, 2): 0.4, (4, 0): 1.2}
    assert sensitivity.reference_u("rmst", term_u) == pytest.approx(math.sqrt(0.09 + 0.16 + 1.44))
    assert sensitivity.reference_u("rmsi", term_u) == pytest.approx(math.sqrt(0.16 + 1.44))
    assert sensitivity.reference_u("rmsa", term_u) == pytest.approx(0.4)


L, U = 31.6, 2.5


@pytest.mark.parametrize(
    "measured, zone, ilac",
    [
        (L - U - 0.01, decision.CONFORMANCE_PROVEN, "pass"),  # just inside L - U
        (L - U, decision.CONFORMANCE_PROVEN, "pass"),  # at L - U
        (L - U + 0.01, decision.UNCERTAINTY_RANGE, "conditional pass"),  # just outside
        (L, decision.UNCERTAINTY_RANGE, "conditional pass"),  # at the limit
        (L + 0.01, decision.UNCERTAINTY_RANGE, "conditional fail"),
        (L + U, decision.UNCERTAINTY_RANGE, "conditional fail"),  # at L + U
        (L + U + 0.01, decision.NONCONFORMANCE_PROVEN, "fail"),  # just outside L + U
        (-(L - U), decision.CONFORMANCE_PROVEN, "pass"),  # a sagitta either way
    ],
)
def test_zone_boundaries(measured, zone, ilac):
    """ISO 14253-1:2017 §5 zones; ILAC-G8:09/2019 §4.2.1 outcomes of simple acceptance (hand
    cases at, just inside and just outside L - U and L + U)."""
    assert decision.zone(measured, L, U) == zone
    assert decision.ilac_outcome(measured, L, U) == ilac


def test_the_close_call_is_not_a_pass_under_guarded_acceptance():
    """Measured irregularity 30.1 nm against 31.6 nm with U = 2.5 nm: inside the uncertainty
    range; simple acceptance passes it (a conditional pass), guarded acceptance (w = U) does not,
    guarded rejection passes it; with w = 0.5 U guarded acceptance passes it again."""
    c = parse("3/-(31.6 nm)")
    budget = combine([Contribution("repeatability", 1.25, "A")])
    for rule, passed in (
        ("simple", True),
        ("strict", False),
        ("lenient", True),
        ("strict:0.5", True),
    ):
        (f,) = evaluate(
            c,
            {"irregularity": 30.1},
            budgets={"irregularity": budget},
            rule=DecisionRule.parse(rule),
        )
        assert f.zone == decision.UNCERTAINTY_RANGE and f.conditional
        assert f.passed is passed, rule
        assert f.U == pytest.approx(2.5)
    (f,) = evaluate(
        c,
        {"irregularity": 33.5},
        budgets={"irregularity": budget},
        rule=DecisionRule.parse("lenient"),
    )
    assert f.passed and f.outcome == "conditional fail"  # rejection needs L + U exceeded


@pytest.mark.parametrize("measured", [25.0, 30.1, 31.6, 33.0, -30.0])
def test_conformance_probability_by_numerical_integration(measured):
    """JCGM 106:2012 §9.3: p_c = integral over the tolerance interval [-L, L] of the normal PDF
    N(measured, u^2) of the measurand, here by scipy.integrate.quad."""
    u = 1.25
    direct, _ = integrate.quad(lambda y: stats.norm.pdf(y, measured, u), -L, L)
    assert decision.conformance_probability(measured, L, u) == pytest.approx(direct, abs=1e-9)


def test_decision_rule_names_and_refusals():
    assert DecisionRule.parse("strict").text == "strict"
    assert DecisionRule.parse("lenient:1.5").text == "lenient:1.5"
    assert DecisionRule.parse("strict").acceptance_limit(10, 1) == 9
    assert DecisionRule.parse("lenient:2").acceptance_limit(10, 1) == 12
    for bad, message in (
        ("loose", "is not one of simple, strict, lenient"),
        ("strict:x", "is not a number"),
        ("simple:2", "takes no guard-band multiple"),
        ("strict:0", "must be in"),
    ):
        with pytest.raises(ValueError, match=message):
            DecisionRule.parse(bad)
