"""Gage R&R against the AIAG MSA manual's worked example and against statsmodels' ANOVA.

Data and results: AIAG, Measurement Systems Analysis reference manual, 4th ed. (2010), the
average-and-range worked example (10 parts, appraisers A, B, C, 3 trials) — values from memory:
EV = 0.20188, AV = 0.22963, GRR = 0.30575, PV = 1.10456, TV = 1.14610, %EV 17.62, %AV 20.04,
%GRR 26.68, %PV 96.38, ndc 5; K1 = 0.5908, K2 = 0.5231, K3 = 0.3146.
"""

from __future__ import annotations

import numpy as np
import pytest

from shopdb.spc import msa

APPRAISER_A = [
    [0.29, -0.56, 1.34, 0.47, -0.80, 0.02, 0.59, -0.31, 2.26, -1.36],
    [0.41, -0.68, 1.17, 0.50, -0.92, -0.11, 0.75, -0.20, 1.99, -1.25],
    [0.64, -0.58, 1.27, 0.64, -0.84, -0.21, 0.66, -0.17, 2.01, -1.31],
]
APPRAISER_B = [
    [0.08, -0.47, 1.19, 0.01, -0.56, -0.20, 0.47, -0.63, 1.80, -1.68],
    [0.25, -1.22, 0.94, 1.03, -1.20, 0.22, 0.55, 0.08, 2.12, -1.62],
    [0.07, -0.68, 1.34, 0.20, -1.28, 0.06, 0.83, -0.34, 2.19, -1.50],
]
APPRAISER_C = [
    [0.04, -1.38, 0.88, 0.14, -1.46, -0.29, 0.02, -0.46, 1.77, -1.49],
    [-0.11, -1.13, 1.09, 0.20, -1.07, -0.67, 0.01, -0.56, 1.45, -1.77],
    [-0.15, -0.96, 0.67, 0.11, -1.45, -0.49, 0.21, -0.49, 1.87, -2.16],
]
CUBE = np.array(
    [np.array(x).T for x in (APPRAISER_A, APPRAISER_B, APPRAISER_C)]
)  # [operator, part, trial]


def test_constants_match_the_manual():
    assert 1 / msa.d2(3) == pytest.approx(0.5908, abs=1e-4)  # K1, 3 trials
    assert 1 / msa.d2_star_single(3) == pytest.approx(0.5231, abs=1e-4)  # K2, 3 appraisers
    assert 1 / msa.d2_star_single(10) == pytest.approx(0.3146, abs=1e-4)  # K3, 10 parts
    assert 1 / msa.d2_star_single(2) == pytest.approx(0.7071, abs=1e-4)


def test_average_and_range_reproduces_the_worked_example():
    g = msa.average_and_range(CUBE)
    assert g.ev == pytest.approx(0.20188, abs=2e-4)
    assert g.av == pytest.approx(0.22963, abs=2e-4)
    assert g.grr == pytest.approx(0.30575, abs=3e-4)
    assert g.pv == pytest.approx(1.10456, abs=5e-4)
    assert g.tv == pytest.approx(1.14610, abs=5e-4)
    assert (g.pct_ev, g.pct_av, g.pct_grr, g.pct_pv) == pytest.approx(
        (17.62, 20.04, 26.68, 96.38), abs=0.05
    )
    assert g.ndc == 5
    assert g.verdict == "may be acceptable depending on the application"


def test_anova_matches_statsmodels():
    pd = pytest.importorskip("pandas")
    smf = pytest.importorskip("statsmodels.formula.api")
    from statsmodels.stats.anova import anova_lm

    k, n, r = CUBE.shape
    rows = [
        {"op": o, "part": p, "y": CUBE[o, p, t]}
        for o in range(k)
        for p in range(n)
        for t in range(r)
    ]
    fit = smf.ols("y ~ C(part) * C(op)", data=pd.DataFrame(rows)).fit()
    ref = anova_lm(fit, typ=2)
    a = msa.anova_components(CUBE)
    for ours, theirs in (
        ("part", "C(part)"),
        ("operator", "C(op)"),
        ("interaction", "C(part):C(op)"),
        ("error", "Residual"),
    ):
        assert a["ss"][ours] == pytest.approx(ref.loc[theirs, "sum_sq"], rel=1e-9)
        assert a["df"][ours] == ref.loc[theirs, "df"]
    # statsmodels tests the interaction against the error term as we do
    assert a["p"]["interaction"] == pytest.approx(ref.loc["C(part):C(op)", "PR(>F)"], rel=1e-6)
    g = msa.anova(CUBE, tolerance=8.0)
    ms = {s: a["ss"][s] / a["df"][s] for s in a["ss"]}
    assert g.ev**2 == pytest.approx(ms["error"])
    assert g.pv**2 == pytest.approx((ms["part"] - ms["interaction"]) / (k * r))
    assert g.pct_grr_tolerance == pytest.approx(100 * 6 * g.grr / 8.0)
    # the two methods agree roughly on this data (common practice: ANOVA is the more precise)
    assert g.grr == pytest.approx(msa.average_and_range(CUBE).grr, rel=0.25)


def test_bad_studies_are_refused():
    with pytest.raises(ValueError, match="not balanced"):
        msa.table_to_cube([1, 1, 2], ["a", "a", "a"], [1, 2, 1], [0.1, 0.2, 0.3])
    with pytest.raises(ValueError, match="at least 2 operators"):
        msa.table_to_cube([1, 1, 2, 2], ["a"] * 4, [1, 2, 1, 2], [0.1, 0.2, 0.3, 0.4])
    with pytest.raises(ValueError, match="tolerance"):
        msa.anova(CUBE, tolerance=-1.0)
    with pytest.raises(ValueError, match="finite"):
        msa.table_to_cube([1], ["a"], [1], [float("nan")])
