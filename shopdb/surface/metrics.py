"""Scalar figure metrics of height maps.

Notes
-----
- PV = max - min, RMS = root mean square about zero, over the valid pixels (after the caller
  removed the terms it does not want, e.g. piston and tilt) — ISO 14999-4 definitions.
- PVr (Evans, "PVr — a robust amplitude parameter for optical surface specification",
  Opt. Eng. 48(4):043605, 2009): PV of a Zernike fit of the surface plus 3 x the RMS of the fit
  residual. shopdb fits all terms of radial order <= ``pvr_order`` (default 7: 36 terms, the
  count Evans used; Evans' set was the 36-term "fringe" ordering, ours is complete through
  order 7), takes the PV of the fit over the valid pixels with the removed terms left out, and
  the residual RMS about zero (the residual has zero mean because piston is in the fit).
- Slopes: central differences (z[i+1] - z[i-1]) / (2 dx) along rows and columns, so a slope
  exists only where all four neighbours are valid; nm per mm is microradian.
"""

from __future__ import annotations

import numpy as np


def pv(values: np.ndarray) -> float:
    """max - min, ignoring NaN (no-data pixels).

    Notes
    -----
    Peak-to-valley over the finite values (common practice; ISO 14999-4:2015 §3).
    """
    return float(np.fmax.reduce(values, axis=None) - np.fmin.reduce(values, axis=None))


def slopes_urad(height_nm: np.ndarray, dx_mm: float) -> tuple[float, float]:
    """(RMS, max) of the slope magnitude in microradians; pixels without four valid neighbours have none.

    Notes
    -----
    Central differences of the height map (numpy.gradient); slope RMS and largest slope in
    microradians (nm / mm = µrad), common practice in optical testing.
    """
    h = height_nm
    gx = np.subtract(h[1:-1, 2:], h[1:-1, :-2])
    gy = np.subtract(h[2:, 1:-1], h[:-2, 1:-1])
    np.multiply(gx, gx, out=gx)
    np.multiply(gy, gy, out=gy)
    gx += gy  # squared magnitude times (2 dx)^2; NaN where a neighbour is missing
    missing = np.isnan(gx)
    count = gx.size - np.count_nonzero(missing)
    if count == 0:
        return float("nan"), float("nan")
    peak = float(np.fmax.reduce(gx, axis=None))  # fmax ignores NaN
    np.fmax(gx, 0.0, out=gx)  # NaN -> 0 (the values are >= 0)
    scale = 0.5 / dx_mm
    return scale * float(np.sqrt(np.sum(gx) / count)), scale * float(np.sqrt(peak))
