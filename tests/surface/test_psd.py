"""PSD normalisation, band RMS, Parseval, against scipy.signal.periodogram."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal

from shopdb.surface import psd
from shopdb.surface.analysis import analyze
from shopdb.surface.maps import SurfaceMap
from shopdb.surface.settings import AnalysisSettings

RNG = np.random.default_rng(5)


@pytest.mark.parametrize("periods,axis", [(8, "x"), (21, "y"), (40, "x")])
def test_cosine_grating_band_rms(periods, axis):
    """A cos(2 pi f0 x) with an integer number of periods: band RMS A / sqrt(2) in f0's band (+-1 %),
    ~0 elsewhere (shared/REFERENCES.md, [calc])."""
    n, dx, amp = 256, 0.2, 7.0
    f0 = periods / (n * dx)
    coord = np.arange(n) * dx
    wave = amp * np.cos(2 * np.pi * f0 * coord)
    z = np.tile(wave, (n, 1)) if axis == "x" else np.tile(wave[:, None], (1, n))
    edges = (0.0, f0 / 2, f0 * 1.5, math.inf)
    for window in ("none", "hann"):
        w = psd.window(np.ones_like(z, bool), kind=window)
        lo, mid, hi = psd.band_rms(z, dx, edges, w=w)
        assert mid.rms_nm == pytest.approx(amp / math.sqrt(2), rel=0.01), window
        assert lo.rms_nm < 0.01 * amp and hi.rms_nm < 0.01 * amp


def test_grating_on_a_circular_aperture_through_analyze():
    """The analysis path: circular clear aperture, apodised (radial Hann) window with energy correction."""
    n, dx, amp, period_mm = 256, 0.4, 5.0, 2.0
    r, c = np.mgrid[:n, :n]
    z = amp * np.cos(2 * np.pi * c * dx / period_mm)
    z[(r - 127.5) ** 2 + (c - 127.5) ** 2 > 127**2] = np.nan
    f0 = 1 / period_mm
    res = analyze(
        SurfaceMap(z, dx, 632.8),
        AnalysisSettings(psd_band_edges_per_mm=(0.0, f0 / 2, 2 * f0, math.inf)),
    )
    lo, mid, hi = res.psd_bands
    assert mid.rms_nm == pytest.approx(amp / math.sqrt(2), rel=0.01)
    assert lo.rms_nm < 0.02 * amp and hi.rms_nm < 0.02 * amp


@pytest.mark.parametrize("window", ["none", "hann"])
def test_parseval_complete_partition(window):
    """Band variances of a complete partition sum to the window-weighted mean square exactly, and to
    the plain variance of a stationary detrended field within 1 %."""
    z = RNG.normal(0, 3.0, (200, 180))
    z[RNG.random(z.shape) < 0.05] = np.nan
    z -= np.nanmean(z)
    w = psd.window(np.isfinite(z), kind=window)
    bands = psd.band_rms(z, 0.1, (0.0, 0.5, 1.0, 2.0, 3.5, math.inf), w=w)
    total = sum(b.rms_nm**2 for b in bands)
    zz = np.nan_to_num(z)
    assert total == pytest.approx(np.sum((zz * w) ** 2) / np.sum(w * w), rel=1e-10)
    assert total == pytest.approx(np.nanvar(z), rel=0.01)


def test_psd_normalisation_matches_scipy_periodogram():
    """Reference library: scipy.signal.periodogram (boxcar, density, two-sided) of a 1-D profile equals
    our 2-D PSD along fy = 0 times dfy for a map that varies along x only."""
    n, dx = 128, 0.05
    prof = RNG.normal(size=n).cumsum()
    prof -= prof.mean()
    z = np.tile(prof, (64, 1))
    p2, _fy, fx = psd.psd2d(z, dx)
    f_ref, p_ref = scipy.signal.periodogram(
        prof, fs=1 / dx, window="boxcar", scaling="density", return_onesided=False, detrend=False
    )
    dfy = 1 / (64 * dx)
    assert np.allclose(fx, f_ref)
    assert np.allclose(p2[0] * dfy, p_ref, rtol=1e-10, atol=1e-12 * p_ref.max())


def test_power_law_slope_is_recovered():
    """A random isotropic surface with PSD ~ f^-2.5 (synthesised in the Fourier domain) gives a radial
    PSD whose log-log slope is -2.5 +- 0.1 (common practice for fractal surface models)."""
    n, dx, beta = 512, 0.1, 2.5
    fy = np.fft.fftfreq(n, dx)[:, None]
    fx = np.fft.fftfreq(n, dx)[None, :]
    f = np.hypot(fy, fx)
    f[0, 0] = np.inf
    spec = (RNG.normal(size=(n, n)) + 1j * RNG.normal(size=(n, n))) * f ** (-beta / 2)
    z = np.fft.ifft2(spec).real
    fr, pr = psd.radial_psd(z, dx)
    sel = (fr > 20 / (n * dx)) & (fr < 0.3 / dx)
    slope = np.polyfit(np.log(fr[sel]), np.log(pr[sel]), 1)[0]
    assert slope == pytest.approx(-beta, abs=0.1)


def test_bands_from_periods():
    edges = psd.bands_from_periods((33.0, 0.12))
    assert edges[0] == 0 and math.isinf(edges[-1])
    assert edges[1:3] == pytest.approx((1 / 33, 1 / 0.12))
    with pytest.raises(ValueError, match="positive"):
        psd.bands_from_periods((0.0,))


def test_band_outside_the_map_is_marked_unresolved():
    z = RNG.normal(size=(64, 64))
    bands = psd.band_rms(
        z, 1.0, (0.0, 0.3, 5.0, 10.0)
    )  # Nyquist 0.5 /mm: the last band is beyond it
    assert bands[-1].resolved is False and bands[-1].rms_nm == 0.0


def test_dropouts_do_not_leak_the_form_into_the_fine_bands():
    """2 % of the pixels dropped at random under 150 nm of power: without a remedy each empty
    pixel is a hole in the window, whose spectrum spreads the form over every band; filled with
    the Zernike fit's value, the band RMS stay within 5 % (or 0.1 nm) of the whole map's, where
    empty holes put 10 nm into the two finer bands. What remains is the ripple missing at the
    dropouts: 2 % of its power, sqrt(0.02) x 0.71 nm = 0.1 nm spread over the bands (Parseval)."""
    from shopdb.surface.analysis import analyze
    from shopdb.surface.maps import SurfaceMap
    from shopdb.surface.settings import AnalysisSettings

    rng = np.random.default_rng(4)
    n = 160
    y, x = np.mgrid[-1 : 1 : n * 1j, -1 : 1 : n * 1j]
    r2 = x * x + y * y
    xs = x * 50.0  # mm over a 100 mm part
    ripple = 1.0 * np.cos(2 * np.pi * xs / 2.5)  # 2.5 mm period: the middle band
    z = np.where(r2 <= 1, 150 * (2 * r2 - 1) + ripple, np.nan)
    settings = AnalysisSettings(psd_band_edges_per_mm=(0, 1 / 33, 1 / 5, 1 / 1.5, math.inf))
    whole = analyze(SurfaceMap(z, 100 / n, 632.8), settings)
    holes = np.where(rng.random(z.shape) < 0.02, np.nan, z)
    holed = analyze(SurfaceMap(holes, 100 / n, 632.8), settings)
    for a, b in zip(whole.psd_bands, holed.psd_bands, strict=True):
        assert b.rms_nm == pytest.approx(a.rms_nm, rel=0.05, abs=0.1)
