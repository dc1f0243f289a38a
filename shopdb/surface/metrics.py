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
- Slopes: central differences of the map (np.gradient), so a slope exists only where both
  neighbours are valid; nm per mm is microradian.
"""

from __future__ import annotations

import numpy as np


def pv(values: np.ndarray) -> float:
    return float(np.max(values) - np.min(values))


def rms(values: np.ndarray) -> float:
    return float(np.sqrt(np.mean(np.square(values))))


def slopes_urad(height_nm: np.ndarray, dx_mm: float) -> tuple[float, float]:
    """(RMS, max) of the slope magnitude in microradians; NaN pixels have no slope."""
    gy, gx = np.gradient(height_nm, dx_mm)
    mag = np.hypot(gx, gy)
    good = np.isfinite(mag)
    if not good.any():
        return float("nan"), float("nan")
    m = mag[good]
    return rms(m), float(m.max())
