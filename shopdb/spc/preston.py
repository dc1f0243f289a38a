"""Preston's law of polishing: removal depth = k_p × pressure × relative speed × time.

Notes
-----
Preston, J. Soc. Glass Technol. 11:214 (1927). With the depth in m, pressure in Pa, speed in
m/s and time in s, k_p is in 1/Pa (m²/N). A machine's k_p from one run is its removal divided
by what it was given (``pressure × speed × time``); over several runs the least-squares line
through the origin, ``k_p = Σ d·w / Σ w²`` with ``w = p·v·t``, is the estimate, its standard
error from the residuals. Charted per machine, a pad or slurry change shows as a shift of k_p
before it shows on the parts.
"""

from __future__ import annotations

import math
from collections.abc import Sequence


def preston_coefficient(
    depth_nm: float, pressure_kpa: float, speed_m_per_s: float, duration_s: float
) -> float:
    """k_p in 1/Pa of one run.

    Notes
    -----
    Preston (1927), see the module notes: depth / (pressure × speed × time).

    Examples
    --------

    >>> f"{preston_coefficient(500.0, 10.0, 0.5, 1800):.3e}"
    '5.556e-14'
    """
    work = pressure_kpa * 1e3 * speed_m_per_s * duration_s
    if not work > 0:
        raise ValueError("Preston's coefficient needs positive pressure, speed and duration")
    return depth_nm * 1e-9 / work


def fit_preston(
    depths_nm: Sequence[float],
    pressures_kpa: Sequence[float],
    speeds_m_per_s: Sequence[float],
    durations_s: Sequence[float],
) -> tuple[float, float]:
    """(k_p, its standard error) in 1/Pa over runs: least squares through the origin.

    Notes
    -----
    ``k = Σ d·w / Σ w²``, standard error ``sqrt(Σ (d − k w)² / (n − 1) / Σ w²)`` (the
    regression through the origin of any statistics handbook).
    """
    w = [
        p * 1e3 * v * t for p, v, t in zip(pressures_kpa, speeds_m_per_s, durations_s, strict=True)
    ]
    d = [x * 1e-9 for x in depths_nm]
    if len(w) < 2 or any(not x > 0 for x in w):
        raise ValueError("a Preston fit needs two or more runs with positive p, v and t")
    sww = sum(x * x for x in w)
    k = sum(a * b for a, b in zip(d, w, strict=True)) / sww
    resid = sum((a - k * b) ** 2 for a, b in zip(d, w, strict=True))
    return k, math.sqrt(resid / (len(w) - 1) / sww)
