"""Chart constants, I-MR, X-bar, EWMA and CUSUM against published tables and worked examples."""

from __future__ import annotations

import numpy as np
import pytest

from shopdb.spc import charts
from shopdb.spc import constants as k

N = range(2, 11)
# ASTM E2587 / Montgomery, Introduction to SQC, App. VI (shared/REFERENCES.md, [calc])
D2 = [1.128, 1.693, 2.059, 2.326, 2.534, 2.704, 2.847, 2.970, 3.078]
C4 = [0.7979, 0.8862, 0.9213, 0.9400, 0.9515, 0.9594, 0.9650, 0.9693, 0.9727]
A2 = [1.880, 1.023, 0.729, 0.577, 0.483, 0.419, 0.373, 0.337, 0.308]
D4 = [3.267, 2.574, 2.282, 2.114, 2.004, 1.924, 1.864, 1.816, 1.777]
D3 = [0, 0, 0, 0, 0, 0.076, 0.136, 0.184, 0.223]


@pytest.mark.parametrize("fn,table,digits", [(k.d2, D2, 3), (k.c4, C4, 4), (k.a2, A2, 3)])
def test_constants_match_the_published_table(fn, table, digits):
    for n, v in zip(N, table, strict=True):
        assert round(fn(n), digits) == pytest.approx(v, abs=10**-digits / 2 + 1e-12), n


@pytest.mark.parametrize("fn,table", [(k.d4_factor, D4), (k.d3_factor, D3)])
def test_range_factors_match_to_the_printed_digit(fn, table):
    """The printed D3/D4 were derived from rounded d3, so they may differ by one in the last digit."""
    for n, v in zip(N, table, strict=True):
        assert fn(n) == pytest.approx(v, abs=0.0011), n


def test_nist_ewma_example():
    """NIST/SEMATECH e-Handbook §6.3.2.4: target 50, lambda 0.3, s 2.0539; asymptotic limits
    52.5884 / 47.4116; no point outside (data from memory, shared/REFERENCES.md)."""
    x = [
        52.0,
        47.0,
        53.0,
        49.3,
        50.1,
        47.0,
        51.0,
        50.1,
        51.2,
        50.5,
        49.6,
        47.6,
        49.9,
        51.3,
        47.8,
        51.2,
        52.6,
        52.4,
        53.6,
        52.1,
    ]
    t = charts.ewma(x, target=50, sigma=2.0539, lam=0.3)
    assert t["ucl"].iloc[-1] == pytest.approx(52.5884, abs=1e-4)
    assert t["lcl"].iloc[-1] == pytest.approx(47.4116, abs=1e-4)
    assert t["statistic"].iloc[0] == pytest.approx(0.3 * 52 + 0.7 * 50)
    assert t["rules"].map(len).sum() == 0
    # exact limits start narrow (Lucas & Saccucci 1990): first limit L sigma sqrt(lambda^2) = 3 * 2.0539 * 0.3
    assert t["ucl"].iloc[0] - 50 == pytest.approx(3 * 2.0539 * 0.3, rel=1e-12)


def test_nist_cusum_example():
    """NIST/SEMATECH e-Handbook §6.3.2.3: target 325, k = 0.3175, h = 4.1959: the first signal is
    at observation 14 (data from memory, shared/REFERENCES.md)."""
    y = [
        324.925,
        324.675,
        324.725,
        324.350,
        325.350,
        325.225,
        324.125,
        324.525,
        325.225,
        324.600,
        324.625,
        325.150,
        328.325,
        327.250,
        327.825,
        328.500,
        326.675,
        327.775,
        326.875,
        328.350,
    ]
    sigma = 0.635
    t = charts.cusum(y, target=325, sigma=sigma, k_sigma=0.3175 / sigma, h_sigma=4.1959 / sigma)
    fired = t.index[t["rules"].map(len) > 0].tolist()
    assert fired[0] + 1 == 14 and "CUSUM+" in t["rules"].iloc[13]
    assert t["statistic"].iloc[12] == pytest.approx(328.325 - 325 - 0.3175, abs=1e-9)


def test_imr_limits_by_hand():
    """I-MR per NIST §6.3.2.2: centre = mean, sigma = MR-bar / 1.128, UCL_MR = 3.267 MR-bar."""
    x = [10.0, 12.0, 11.0, 13.0, 12.0, 11.0, 10.0, 12.0]
    t = charts.individuals(x)
    mr_bar = np.mean(np.abs(np.diff(x)))
    assert t["centre"].iloc[0] == pytest.approx(np.mean(x))
    assert t["ucl"].iloc[0] == pytest.approx(np.mean(x) + 3 * mr_bar / 1.128, rel=1e-3)
    assert t["mr_ucl"].iloc[0] == pytest.approx(3.267 * mr_bar, rel=1e-3)
    assert np.isnan(t["mr"].iloc[0]) and t["mr"].iloc[1] == 2.0


def test_phases_recompute_limits_and_phase_two_is_frozen():
    rng = np.random.default_rng(0)
    a = rng.normal(10, 1, 30)
    b = rng.normal(20, 1, 30)
    t = charts.individuals(
        np.r_[a, b], phases=["before"] * 30 + ["after pad change"] * 30, baseline=20
    )
    assert t["centre"].iloc[0] == pytest.approx(a[:20].mean())
    assert t["centre"].iloc[40] == pytest.approx(b[:20].mean())
    assert t["baseline"].sum() == 40 and not t["baseline"].iloc[25]
    # one chart without the phase split sees the shift
    t1 = charts.individuals(np.r_[a, b], baseline=20)
    assert (t1["rules"].map(len) > 0).iloc[30:].all()


def test_iterative_baseline_removal_drops_an_outlier():
    x = [10, 10.5, 9.8, 10.2, 30.0, 10.1, 9.9, 10.3, 10.0, 9.7]
    plain = charts.individuals(x)
    it = charts.individuals(x, iterate=True)
    assert not it["baseline"].iloc[4]
    assert it["ucl"].iloc[0] < plain["ucl"].iloc[0]
    assert "N1" in it["rules"].iloc[4]


def test_improvement_direction():
    x = [5.0] * 10 + [5.2, 4.8] * 5 + [1.0]  # a drop in RMS: better
    t = charts.individuals(x, baseline=20)
    assert t["signal"].iloc[-1] == "improvement"
    t = charts.individuals(x, baseline=20, direction="higher")
    assert t["signal"].iloc[-1] == "deterioration"


def test_xbar_r_and_s():
    rng = np.random.default_rng(1)
    g = rng.normal(5, 2, (25, 5))
    r = charts.xbar(g, spread="range")
    s = charts.xbar(g, spread="sd")
    rbar = np.ptp(g, axis=1).mean()
    assert r["ucl"].iloc[0] - r["centre"].iloc[0] == pytest.approx(k.a2(5) * rbar, rel=1e-12)
    assert r["spread_ucl"].iloc[0] == pytest.approx(k.d4_factor(5) * rbar)
    sbar = g.std(axis=1, ddof=1).mean()
    assert s["ucl"].iloc[0] - s["centre"].iloc[0] == pytest.approx(k.a3(5) * sbar, rel=1e-12)


@pytest.mark.parametrize(
    "bad,message", [([1.0, np.nan, 2.0], "NaN"), ([[1.0, 2.0]], "one-dimensional")]
)
def test_bad_values(bad, message):
    with pytest.raises(ValueError, match=message):
        charts.individuals(bad)


def test_empty_and_short_inputs():
    assert len(charts.individuals([])) == 0
    t = charts.individuals([3.0])
    assert np.isnan(t["ucl"].iloc[0])
