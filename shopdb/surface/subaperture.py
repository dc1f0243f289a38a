"""Sub-aperture (test-field) evaluation of ISO 10110-5 surface-form tolerances.

When a callout states a test field of diameter d (ISO 10110-5:2015: the tolerance applies to
every area of that diameter within the clear aperture), each sub-aperture of diameter d that lies
wholly inside the clear aperture is analysed on its own — piston, tilt and power are fitted over
that sub-aperture, so the sagitta deviation, irregularity and RMS values are those a test plate
of diameter d would show there — and the worst value of each quantity is reported with where it
occurs.

Sub-aperture centres lie on a square grid through the clear-aperture centre with a step of d/4 by
default (whole pixels, so every sub-aperture has the same pixel mask and shares one cached Zernike
basis; its dropouts are handled by the engine's downdate).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from shopdb.surface.analysis import analyze, resolve_aperture
from shopdb.surface.maps import SurfaceMap
from shopdb.surface.settings import AnalysisSettings

FIELDS = ("sag_nm", "irregularity_nm", "rsi_nm", "rmst_nm", "rmsi_nm", "rmsa_nm")


@dataclass(frozen=True)
class SubApertureScan:
    """The worst ISO 10110-5 quantities over a test field's sub-apertures.

    Notes
    -----
    ISO 10110-5:2015 §4: with a test field the tolerance applies to every area of that
    diameter within the clear aperture.
    """

    diameter_mm: float
    count: int  # sub-apertures analysed
    worst: dict[str, float]  # quantity -> its value where its magnitude is largest (signed)
    where_mm: dict[str, tuple[float, float]]  # quantity -> (x, y) of that sub-aperture's centre


def scan(
    surface: SurfaceMap,
    settings: AnalysisSettings,
    *,
    clear_aperture_mm: float,
    field_diameter_mm: float,
    step_mm: float | None = None,
) -> SubApertureScan:
    """Worst ISO 10110-5 quantities over the test-field sub-apertures of the clear aperture.

    ``(x, y)`` are mm from the clear-aperture centre, +x along the columns, +y up the image.

    Notes
    -----
    ISO 10110-5:2015 §4 (test field); each sub-aperture analysed on its own as a test plate
    of that diameter would show it (see the module notes).
    """
    if not (math.isfinite(field_diameter_mm) and field_diameter_mm > 0):
        raise ValueError(f"test field diameter must be > 0 mm, got {field_diameter_mm}")
    if field_diameter_mm > clear_aperture_mm:
        raise ValueError(
            f"test field Ø {field_diameter_mm:g} mm is larger than the clear aperture "
            f"Ø {clear_aperture_mm:g} mm"
        )
    dx = surface.dx_mm
    whole = replace(settings, clear_aperture_fraction=None, clear_aperture_mm=clear_aperture_mm)
    geom = resolve_aperture(surface, whole)
    cr, cc = geom.centre_rc
    big_r = clear_aperture_mm / 2 / dx
    small_r = field_diameter_mm / 2 / dx
    step = max(1, round((step_mm or field_diameter_mm / 4) / dx))
    reach = int((big_r - small_r) // step)
    z = np.where(geom.mask, surface.height_nm, np.nan)  # nothing outside the clear aperture counts
    half = math.ceil(small_r) + 1
    sub = replace(
        settings,
        aperture="circular",
        clear_aperture_fraction=None,
        clear_aperture_mm=None,
        edge_exclusion_mm=0.0,
        obscuration_fraction=0.0,
        obscuration_mm=None,
    )
    worst: dict[str, float] = {}
    where: dict[str, tuple[float, float]] = {}
    count = 0
    for i in range(-reach, reach + 1):
        for j in range(-reach, reach + 1):
            if math.hypot(i * step, j * step) + small_r > big_r + 1e-9:
                continue
            r, c = cr - i * step, cc + j * step
            r0, c0 = math.floor(r) - half, math.floor(c) - half
            if r0 < 0 or c0 < 0 or r0 + 2 * half + 2 > z.shape[0] or c0 + 2 * half + 2 > z.shape[1]:
                continue
            crop = z[r0 : r0 + 2 * half + 2, c0 : c0 + 2 * half + 2]
            piece = replace(surface, height_nm=crop, centre_rc=(r - r0, c - c0), radius_px=small_r)
            try:
                res = analyze(piece, sub)
            except ValueError:
                continue  # a sub-aperture with too few valid pixels is not judged
            count += 1
            for f in FIELDS:
                v = float(getattr(res, f))
                if f not in worst or abs(v) > abs(worst[f]):
                    worst[f] = v
                    where[f] = (j * step * dx, i * step * dx)
    if count == 0:
        raise ValueError(
            f"no test-field sub-aperture of Ø {field_diameter_mm:g} mm has enough valid pixels"
        )
    return SubApertureScan(field_diameter_mm, count, worst, where)
