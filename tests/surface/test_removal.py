"""The difference of two maps of one part, registered on the aperture (before − after)."""

from __future__ import annotations

import numpy as np
import pytest

from shopdb.surface import zernike
from shopdb.surface.removal import difference


def _part(n, centre, radius, coefs):
    rows, cols = np.mgrid[:n, :n]
    x, y = (cols - centre[1]) / radius, (centre[0] - rows) / radius
    rho, theta = np.hypot(x, y), np.arctan2(y, x)
    z = sum(
        (c * zernike.zernike(nn, mm, rho, theta) for (nn, mm), c in coefs.items()),
        np.zeros(rho.shape),
    )
    return np.where(rho <= 1, z, np.nan)


def test_a_shifted_remeasurement_of_the_same_surface_differs_by_nothing():
    """The same part (astigmatism and coma, 20 nm RMS) seen 3.4 px lower and 1.7 px to the right
    on the detector: registered on the fitted aperture centres, the difference is under 2 % of
    the surface RMS (bilinear interpolation); unregistered it is ten times that and more."""
    coefs = {(2, 2): 15.0, (3, 1): 12.0}
    before = _part(160, (79.5, 79.5), 70.0, coefs)
    after = _part(160, (82.9, 81.2), 70.0, coefs)
    d = difference(before, after)
    assert d.shift_rc == pytest.approx((-3.4, -1.7), abs=0.05)
    assert d.rms_nm < 0.02 * 19.2
    assert difference(before, after, register=False).rms_nm > 10 * d.rms_nm


def test_removal_of_a_known_run():
    """A run that took 30 nm of power and 5 nm of astigmatism off: the removal is exactly that
    (orthonormal terms: RMS sqrt(30^2 + 5^2)); with power removed only the astigmatism is left."""
    before = _part(128, (63.5, 63.5), 60.0, {(2, 0): 40.0, (2, 2): 8.0})
    after = _part(128, (63.5, 63.5), 60.0, {(2, 0): 10.0, (2, 2): 3.0})
    d = difference(before, after)
    assert d.rms_nm == pytest.approx(np.hypot(30.0, 5.0), rel=0.02)
    assert difference(before, after, remove=("piston", "tilt", "power")).rms_nm == pytest.approx(
        5.0, rel=0.03
    )
    with pytest.raises(ValueError, match="cannot remove"):
        difference(before, after, remove=("coma",))
