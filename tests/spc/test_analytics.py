"""Capability, convergence, drift and KPIs."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
import pytest

from shopdb.spc import capability as cap
from shopdb.spc import convergence as conv
from shopdb.spc import drift as dr
from shopdb.spc import kpi


def test_nist_capability_example():
    """NIST/SEMATECH e-Handbook §6.1.6: USL 20, LSL 8, mu 16, sigma 2 -> Cp 1.00, Cpk 0.667."""
    rng = np.random.default_rng(0)
    x = rng.normal(16, 2, 200)
    x = (x - x.mean()) / x.std(ddof=1) * 2 + 16  # exactly mean 16, sd 2
    c = cap.capability(x, usl=20, lsl=8, sigma_within=2.0)
    assert c.cp == pytest.approx(1.0) and c.cpk == pytest.approx(2 / 3)
    assert c.pp == pytest.approx(1.0) and c.ppk == pytest.approx(2 / 3)


def test_bissell_interval():
    """Bissell (1990): Cpk +- z sqrt(1/(9n) + Cpk^2/(2(n-1))); n = 50, Cpk 1.33 at 95 % -> about 1.05..1.61
    (arithmetic by hand)."""
    lo, hi = cap.bissell_ci(1.33, 50)
    assert lo == pytest.approx(1.33 - 1.95996 * np.sqrt(1 / 450 + 1.33**2 / 98), rel=1e-5)
    assert 1.04 < lo < 1.07 and 1.59 < hi < 1.62


def test_one_sided_zero_bounded_metric_uses_upper_index_and_percentiles():
    rng = np.random.default_rng(2)
    rms = rng.lognormal(np.log(8), 0.25, 300)
    c = cap.capability(rms, usl=20)
    assert c.cp is None and c.cpk == pytest.approx((20 - rms.mean()) / (3 * c.sigma_within))
    assert "one-sided" in c.method_note and c.percentile_ppk is not None
    # the lognormal percentile index: (USL - median) / (q99.865 - median) of the fitted distribution
    med, q = 8.0, np.exp(np.log(8) + 0.25 * 3.0)
    assert c.percentile_ppk == pytest.approx((20 - med) / (q - med), rel=0.08)


def test_capability_bad_input():
    with pytest.raises(ValueError, match="specification limit"):
        cap.capability([1, 2, 3])
    with pytest.raises(ValueError, match="at least 3"):
        cap.capability([1, 2], usl=3)


def test_convergence_forecast_covers_the_truth_in_90_percent_of_trials():
    """Synthetic geometric sequences y = f + A r^i with 5 % noise: the forecast interval holds the
    true number of further runs in >= 90 % of seeded trials."""
    hits, trials = 0, 60
    for seed in range(trials):
        rng = np.random.default_rng(seed)
        r, f, a = rng.uniform(0.45, 0.75), rng.uniform(1, 3), rng.uniform(80, 150)
        tol = f + rng.uniform(2, 6)
        its = np.arange(0, 5)
        y = (f + a * r**its) * np.exp(rng.normal(0, 0.05, its.size))
        truth = conv.runs_to_reach(a, r, f, tol, its[-1])
        c = conv.analyse(its, y, tolerance=tol, seed=seed)
        if c.runs_interval and c.runs_interval[0] <= truth <= c.runs_interval[1]:
            hits += 1
    assert hits >= 0.9 * trials


def test_convergence_floor_matches_scipys_bounded_minimiser():
    """The profile fit's floor against scipy.optimize.minimize_scalar (bounded Brent) on the
    same objective: the same minimum, to the search's resolution."""
    from scipy import optimize

    rng = np.random.default_rng(3)
    for _ in range(20):
        its = np.arange(7.0)
        y = rng.uniform(2, 15) + rng.uniform(50, 200) * rng.uniform(0.3, 0.8) ** its
        y = y * np.exp(rng.normal(0, 0.03, its.size))
        _, _, f = conv.fit(its, y)

        def sse(fl, its=its, y=y):
            b, la = np.polyfit(its, np.log(y - fl), 1)
            return float(np.sum((np.log(y) - np.log(fl + np.exp(la + b * its))) ** 2))

        hi = y.min() * 0.999
        ref = optimize.minimize_scalar(sse, bounds=(0, hi), method="bounded")
        assert sse(f) <= sse(ref.x) + 1e-9
        assert f == pytest.approx(ref.x, abs=1e-3 * hi)


def test_convergence_recovers_ratio():
    its = np.arange(6)
    y = 2.0 + 100 * 0.6**its
    c = conv.analyse(its, y, tolerance=5.0)
    assert c.ratio == pytest.approx(0.6, rel=1e-3) and c.floor == pytest.approx(2.0, rel=1e-2)
    assert (
        c.runs_remaining == conv.runs_to_reach(100, 0.6, 2.0, 5.0, 5) and c.status == "converging"
    )


def test_stalled_diverging_and_not_converging():
    assert conv.analyse([0, 1, 2, 3], [100, 40, 38, 36.5], tolerance=10).status == "stalled"
    assert conv.analyse([0, 1, 2], [100, 40, 55], tolerance=10).status == "diverging"
    c = conv.analyse([0, 1, 2, 3, 4, 5], 20 + 80 * 0.5 ** np.arange(6), tolerance=10)
    assert c.status == "not converging" and any("floor" in n for n in c.notes)
    assert conv.analyse([0, 1], [20, 8], tolerance=10).status == "in tolerance"


def test_dominant_component():
    assert conv.dominant_component({"power": 3.0, "astigmatism": -5.0, "mid-spatial": 1.0}) == (
        "astigmatism",
        -5.0,
    )


def test_linear_drift_recovered_within_its_band_and_due_date():
    """A known drift of 2 nm/month with 0.3 nm noise over 8 quarterly calibrations."""
    rng = np.random.default_rng(4)
    t0 = datetime(2025, 1, 1, tzinfo=UTC)
    times = [t0 + timedelta(days=91 * i) for i in range(8)]
    rate = 2.0 / dr.DAYS_PER_MONTH
    vals = [5 + rate * (t - t0).days + rng.normal(0, 0.3) for t in times]
    now = times[-1] + timedelta(days=60)
    d = dr.drift(times, vals, now=now, threshold=3.0)
    assert d.rate_ci[0] <= 2.0 <= d.rate_ci[1]
    assert d.rate_per_month == pytest.approx(2.0, abs=0.2)
    true_due = times[-1] + timedelta(days=3.0 / rate)
    assert abs((d.exceeds_at - true_due).days) <= 91  # within one calibration interval
    assert d.predicted_change_since_last == pytest.approx(2.0 * 60 / dr.DAYS_PER_MONTH, abs=0.4)


def test_drift_slope_and_interval_match_scipy_linregress():
    """The slope, its standard error and t interval against scipy.stats.linregress and
    scipy.stats.t (an independent reference implementation of ordinary least squares)."""
    from scipy import stats

    rng = np.random.default_rng(11)
    t0 = datetime(2025, 1, 1, tzinfo=UTC)
    times = [t0 + timedelta(days=int(d)) for d in np.sort(rng.uniform(0, 700, 9))]
    days = np.array([(t - t0).days for t in times], float)
    vals = 3 - 0.004 * days + rng.normal(0, 0.2, days.size)
    d = dr.drift(times, list(vals), now=times[-1])
    ref = stats.linregress(days, vals)
    tq = stats.t.ppf(0.975, days.size - 2)
    per_month = dr.DAYS_PER_MONTH
    assert d.rate_per_month == pytest.approx(ref.slope * per_month, rel=1e-12)
    assert d.rate_ci[0] == pytest.approx((ref.slope - tq * ref.stderr) * per_month, rel=1e-10)
    assert d.rate_ci[1] == pytest.approx((ref.slope + tq * ref.stderr) * per_month, rel=1e-10)


def test_kpis_and_pareto_by_hand():
    """10 parts with known outcomes: FPY 6/10 in one group, rework and scrap counted by hand."""
    rows = []
    for i in range(10):
        rows.append(
            {
                "part": f"P{i}",
                "group": "2026-01" if i < 6 else "2026-02",
                "first_pass": i not in (1, 4, 7, 8),
                "reworks": 1 if i in (1, 4, 7) else 0,
                "scrapped": i == 8,
                "iterations": 3 + (i % 2),
                "cycle_days": 10.0,
                "failed_fields": ["irregularity"]
                if i in (1, 7)
                else ["sag"]
                if i in (4, 8)
                else [],
                "conditional": i in (0, 6, 9),  # a field inside its uncertainty range
            }
        )
    df = pd.DataFrame(rows)
    k = kpi.kpis(df).set_index("group")
    assert k.loc["2026-01", "first_pass_yield"] == pytest.approx(4 / 6)
    assert k.loc["2026-02", "first_pass_yield"] == pytest.approx(2 / 4)
    assert k.loc["2026-02", "scrap_rate"] == pytest.approx(1 / 4)
    assert k.loc["2026-01", "rework_rate"] == pytest.approx(2 / 6)
    assert k.loc["2026-01", "conditional_rate"] == pytest.approx(1 / 6)
    assert k.loc["2026-02", "conditional_rate"] == pytest.approx(2 / 4)
    p = kpi.pareto(df)
    assert p["reason"].tolist() == ["irregularity", "sag"] and p["count"].tolist() == [2, 2]
    assert p["cumulative_share"].iloc[-1] == 1.0
