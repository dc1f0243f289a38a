"""Tool influence functions and the dwell planner, against scipy.signal.fftconvolve, the
Gaussian's closed-form volume and a synthetic truth (a known dwell's removal)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.integrate
import scipy.signal

from shopdb.surface import dwell

RNG = np.random.default_rng(20261203)


def _disk(n: int, diameter_mm: float):
    dx = diameter_mm / n
    y, x = (np.mgrid[:n, :n] - (n - 1) / 2) * dx
    return x, y, dx, np.hypot(x, y) <= diameter_mm / 2


@pytest.mark.parametrize(
    "shape,kshape", [((40, 57), (7, 7)), ((33, 33), (31, 31)), ((64, 48), (5, 9))]
)
def test_convolution_is_scipy_fftconvolve_same(shape, kshape):
    """Reference library: scipy.signal.fftconvolve(mode="same") (the convention of the removal
    sum over dwell points)."""
    a, k = RNG.normal(size=shape), RNG.random(kshape)
    np.testing.assert_allclose(
        dwell.convolve(a, k), scipy.signal.fftconvolve(a, k, mode="same"), atol=1e-10
    )


def test_gaussian_tif_volume_rate_is_its_closed_form():
    """The volume removed per unit time by peak*exp(-r²/2σ²) is 2πσ²·peak (the Gaussian
    integral; checked here by scipy.integrate.dblquad and by the sampled kernel's sum)."""
    tif = dwell.GaussianTIF(sigma_mm=2.5, peak_nm_per_s=3.0, cut_sigmas=6.0)
    integral, _ = scipy.integrate.dblquad(
        lambda y, x: 3.0 * math.exp(-(x * x + y * y) / (2 * 2.5**2)), -15, 15, -15, 15
    )
    closed = 2 * math.pi * 2.5**2 * 3.0
    assert integral == pytest.approx(closed, rel=1e-7)  # ±6σ leaves out e^-18 of it
    assert tif.volume_rate_mm3_per_min == pytest.approx(closed * 1e-6 * 60)
    assert tif.kernel(0.1).sum() * 0.1**2 == pytest.approx(closed, rel=1e-6)


def _truth(n=256, diameter=100.0, sigma=2.5, spacing=1.0):
    """A known non-negative dwell on the machine grid and the removal it makes on the map."""
    x, y, dx, inside = _disk(n, diameter)
    tif = dwell.GaussianTIF(sigma_mm=sigma, peak_nm_per_s=2.0)
    step = round(spacing / dx)
    fine = np.zeros((n, n))
    rows, cols = np.arange(0, n, step), np.arange(0, n, step)
    rr, cc = np.meshgrid(rows, cols, indexing="ij")
    smooth = 20 + 15 * np.cos(x / 9) * np.sin(y / 13) + 0.15 * (x + y)
    t_true = np.clip(smooth[rr, cc], 0, None)  # seconds, non-negative
    fine[rr, cc] = t_true
    removal = scipy.signal.fftconvolve(fine, tif.kernel(dx), mode="same")
    return np.where(inside, removal, np.nan), dx, tif, inside


def test_the_planner_recovers_what_a_known_dwell_removes():
    """Synthetic truth: the removal of a known dwell, given as the error to remove, is removed
    to below 2 % of its RMS (the target lies in the TIF's reach), and the planner's own
    prediction equals an independent simulation of its dwell (fftconvolve) within 3 %."""
    height, dx, tif, inside = _truth()
    plan = dwell.plan_dwell(height, dx, tif, spacing_mm=1.0)
    before = np.nanstd(height)
    after = np.nanstd(plan.predicted_nm)
    assert after < 0.02 * before, (after, before)
    assert (plan.dwell_s >= 0).all() and plan.total_time_s > 0
    # simulate the plan independently on the map grid
    n = height.shape[0]
    padded = _simulate(plan, tif, dx, n)
    simulated = np.where(inside, height - padded, np.nan)
    simulated -= np.nanmean(simulated)
    assert np.nanstd(simulated) == pytest.approx(after, rel=0.03, abs=0.002 * before)


def _simulate(plan, tif, dx, n):
    """Removal on the n×n map of every grid point's dwell, including points beyond the map."""
    r0, c0 = plan.origin_rc
    rows, cols = plan.dwell_s.shape
    pad = max(
        0, -r0, -c0, r0 + (rows - 1) * plan.step_px - n + 1, c0 + (cols - 1) * plan.step_px - n + 1
    )
    big = np.zeros((n + 2 * pad, n + 2 * pad))
    for (i, j), t in np.ndenumerate(plan.dwell_s):
        big[pad + r0 + i * plan.step_px, pad + c0 + j * plan.step_px] = t
    return scipy.signal.fftconvolve(big, tif.kernel(dx), mode="same")[pad : pad + n, pad : pad + n]


def test_ripple_finer_than_the_tif_is_left_alone():
    """The band limit: a Gaussian TIF's transfer is exp(-2π²σ²f²) (the Fourier transform of a
    Gaussian); for a 1.5 mm ripple and σ = 2.5 mm it is e^-54, so the planner can remove the
    form under it and must leave the ripple (>= 90 % of its RMS)."""
    x, y, dx, inside = _disk(256, 60.0)
    ripple = 2.0 * np.sin(2 * np.pi * x / 1.5)
    form = 25 * (2 * (np.hypot(x, y) / 30) ** 2 - 1)
    tif = dwell.GaussianTIF(sigma_mm=2.5, peak_nm_per_s=2.0)
    plan = dwell.plan_dwell(np.where(inside, form + ripple, np.nan), dx, tif, spacing_mm=1.0)
    left = np.nanstd(plan.predicted_nm)
    assert 0.9 * np.std(ripple[inside]) <= left <= 1.1 * np.std(ripple[inside])


def test_a_spot_test_gives_back_the_tif():
    """A stationary dwell of 30 s with a Gaussian TIF: (before − after)/30 s is the TIF (its
    peak and its volume rate within 1 %), wherever on the map the spot sits."""
    n, dx = 200, 0.2
    tif = dwell.GaussianTIF(sigma_mm=2.0, peak_nm_per_s=1.5)
    before = RNG.normal(scale=0.05, size=(n, n)) + 7.0
    spot = np.zeros((n, n))
    spot[120, 80] = 30.0
    after = before - scipy.signal.fftconvolve(spot, tif.kernel(dx), mode="same")
    measured = dwell.spot_tif(before, after, dx, 30.0, diameter_mm=16.0)
    assert measured.rate_nm_per_s.max() == pytest.approx(1.5, rel=0.01)
    assert measured.volume_rate_mm3_per_min == pytest.approx(tif.volume_rate_mm3_per_min, rel=0.01)
    with pytest.raises(ValueError, match="positive dwell"):
        dwell.spot_tif(before, after, dx, 0.0, diameter_mm=16.0)


def test_bad_plans_are_refused():
    tif = dwell.GaussianTIF(sigma_mm=2.0, peak_nm_per_s=1.0)
    with pytest.raises(ValueError, match="too few valid pixels"):
        dwell.plan_dwell(np.full((8, 8), np.nan), 0.5, tif)
    with pytest.raises(ValueError, match="positive"):
        dwell.plan_dwell(np.zeros((32, 32)), 0.5, tif, spacing_mm=0)
    with pytest.raises(ValueError, match="positive sigma"):
        dwell.GaussianTIF(sigma_mm=0, peak_nm_per_s=1.0)
