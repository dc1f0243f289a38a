"""The aperture's edge, found from the valid pixels, against synthetic disks of known centre and
radius (pixel centres inside the circle are valid: the digitisation of a disk)."""

from __future__ import annotations

import numpy as np
import pytest

from shopdb.surface.aperture import SNAP_PX, fit_circle, resolve
from shopdb.surface.maps import SurfaceMap

RNG = np.random.default_rng(31)


def _disk(n: int, centre, radius, *, dropout: float = 0.0) -> np.ndarray:
    rows, cols = np.mgrid[:n, :n]
    valid = (rows - centre[0]) ** 2 + (cols - centre[1]) ** 2 <= radius**2
    return valid & (RNG.random(valid.shape) >= dropout)


@pytest.mark.parametrize("radius", [20.3, 40.7, 60.0, 63.4, 150.2, 300.6])
def test_edge_estimate_tolerance_on_digitised_disks(radius):
    """The stated tolerance (shopdb.surface.aperture.fit_circle): radius within 0.03 px (0.01 px
    at 40 px and above) and centre within 0.05 px on clean disks, over random sub-pixel centres;
    the analysed aperture adds at most half the 0.02 px snap."""
    n = int(2 * radius + 12)
    tol_r = 0.03 if radius < 40 else 0.012
    for _ in range(8):
        c = (n / 2 + RNG.uniform(-1, 1), n / 2 + RNG.uniform(-1, 1))
        valid = _disk(n, c, radius)
        (rc, cc), r = fit_circle(valid)
        assert r == pytest.approx(radius, abs=tol_r)
        assert np.hypot(rc - c[0], cc - c[1]) < 0.05
        geom = resolve(valid, 1.0)
        assert geom.radius_px == pytest.approx(radius, abs=tol_r + SNAP_PX / 2)


def test_edge_estimate_with_dropouts_at_the_edge():
    """2 % of the pixels dropped at random, edge ones included: within 0.05 px."""
    for radius in (40.7, 61.2):
        n = int(2 * radius + 12)
        c = (n / 2 + 0.37, n / 2 - 0.21)
        (rc, cc), r = fit_circle(_disk(n, c, radius, dropout=0.02))
        assert r == pytest.approx(radius, abs=0.05)
        assert np.hypot(rc - c[0], cc - c[1]) < 0.08


def test_a_50_mm_disk_on_a_128_grid_keeps_its_pixels_and_its_coma():
    """A 50 mm radius disk on a 128^2 grid (0.8 mm pixels): the analysed aperture holds every
    valid pixel and no invalid one, and coma reads its true value (a radius 0.1 px too large
    read it 0.47 % high: (1 + 0.1 / 62.5)^3)."""
    from shopdb.surface import zernike
    from shopdb.surface.analysis import analyze
    from shopdb.surface.settings import AnalysisSettings

    dx, radius_mm = 0.8, 50.0
    c = (63.4, 64.1)
    r_px = radius_mm / dx
    rows, cols = np.mgrid[:128, :128]
    x, y = (cols - c[1]) / r_px, (c[0] - rows) / r_px
    rho, theta = np.hypot(x, y), np.arctan2(y, x)
    z = np.where(rho <= 1, 20.0 * zernike.zernike(3, 1, rho, theta), np.nan)
    a = analyze(SurfaceMap(z, dx, 632.8), AnalysisSettings(zernike_order=4))
    assert a.valid_fraction == 1.0 and a.aperture_pixels == int(np.isfinite(z).sum())
    assert a.aperture_radius_mm == pytest.approx(radius_mm, abs=0.02 * dx)
    assert a.coefficient(3, 1) == pytest.approx(20.0, rel=1e-3)
