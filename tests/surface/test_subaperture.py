"""Test-field (sub-aperture) evaluation, checked against closed-form geometry.

A paraboloid z = c r^2 restricted to any circle of radius a is, after removing piston and tilt,
pure power with sagitta c a^2 wherever the circle sits (expand (x0 + u)^2: the cross terms are
tilt) — so every sub-aperture shows sag c a^2 and no irregularity (common practice: the reason a
test plate smaller than the part sees less power).
"""

from __future__ import annotations

import numpy as np
import pytest

from shopdb.surface.analysis import analyze
from shopdb.surface.maps import SurfaceMap
from shopdb.surface.settings import AnalysisSettings
from shopdb.surface.subaperture import scan

N = 257
DX = 100 / (N - 1)
Y, X = (np.mgrid[:N, :N] - (N - 1) / 2) * DX  # Y grows down the rows
R2 = X**2 + Y**2
C = 200 / 50**2  # 200 nm of sag over the full 100 mm


def _map(z):
    return SurfaceMap(np.where(R2 <= 50**2, z, np.nan), DX, 632.8)


def test_power_in_a_sub_aperture_scales_with_its_area():
    m = _map(C * R2)
    assert analyze(m, AnalysisSettings(clear_aperture_mm=90)).sag_nm == pytest.approx(C * 45**2)
    res = scan(m, AnalysisSettings(), clear_aperture_mm=90, field_diameter_mm=20)
    assert res.count > 50
    assert res.worst["sag_nm"] == pytest.approx(C * 10**2, rel=1e-6)
    assert res.worst["irregularity_nm"] < 1e-6 and res.worst["rsi_nm"] < 1e-6


def test_worst_sub_aperture_finds_a_local_defect():
    # a 30 nm bump 25 mm right of and 10 mm above the centre (y up the image = -row)
    bump = 30 * np.exp(-((X - 25) ** 2 + (Y + 10) ** 2) / (2 * 3**2))
    res = scan(_map(bump), AnalysisSettings(), clear_aperture_mm=90, field_diameter_mm=20)
    x, y = res.where_mm["irregularity_nm"]
    assert np.hypot(x - 25, y - 10) < 10  # the worst sub-aperture contains the bump
    assert res.worst["irregularity_nm"] > 20
    whole = analyze(_map(bump), AnalysisSettings(clear_aperture_mm=90))
    assert res.worst["irregularity_nm"] > 0.5 * whole.irregularity_nm


def test_field_larger_than_the_clear_aperture_is_refused():
    with pytest.raises(ValueError, match="larger than the clear aperture"):
        scan(_map(C * R2), AnalysisSettings(), clear_aperture_mm=40, field_diameter_mm=50)
