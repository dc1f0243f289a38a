"""Process capability.

Notes
-----
- Cp = (USL - LSL) / (6 sigma_within), Cpk = min(USL - mu, mu - LSL) / (3 sigma_within); Pp, Ppk
  the same with the overall sample standard deviation (NIST/SEMATECH e-Handbook §6.1.6;
  Montgomery §8.2). sigma_within is MR-bar / d2(2) from successive individuals.
- PV, RMS and the like are one-sided (an upper limit) and bounded at zero: the upper index
  Cpu = (USL - mu) / (3 sigma) is reported, and, because such metrics are skewed, the ISO 22514-2
  percentile method on a fitted lognormal: Ppu* = (USL - X50) / (X99.865 - X50).
- Confidence interval of Cpk (and Cpu): Bissell's approximation, Cpk +- z sqrt(1/(9n) +
  Cpk^2 / (2(n - 1))) (Bissell, Applied Statistics 39(1):1990).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
from scipy import special

from shopdb.spc import constants as k


@dataclass(frozen=True)
class Capability:
    """Capability indices of one metric against its limits.

    Notes
    -----
    See the module notes: NIST/SEMATECH e-Handbook §6.1.6, ISO 22514-2, Bissell 1990.
    """

    n: int
    mean: float
    sigma_within: float
    sigma_overall: float
    cp: float | None
    cpk: float | None
    pp: float | None
    ppk: float | None
    cpk_ci: tuple[float, float] | None
    percentile_ppk: float | None  # ISO 22514-2 percentile method, lognormal fit (one-sided upper)
    method_note: str

    def as_dict(self) -> dict:
        return asdict(self)


def bissell_ci(index: float, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Confidence interval of a capability index from ``n`` values.

    Notes
    -----
    Bissell, Applied Statistics 39(1):87 (1990): index +- z sqrt(1 / (9n) + index^2 /
    (2(n - 1))).
    """
    z = special.ndtri(0.5 + confidence / 2)  # standard normal quantile
    half = z * math.sqrt(1 / (9 * n) + index**2 / (2 * (n - 1)))
    return index - half, index + half


def capability(
    values,
    *,
    usl: float | None = None,
    lsl: float | None = None,
    sigma_within: float | None = None,
    confidence: float = 0.95,
) -> Capability:
    """Cp/Cpk (or the one-sided Cpu/Cpl), Pp/Ppk and the ISO 22514-2 percentile index.

    Notes
    -----
    NIST/SEMATECH e-Handbook §6.1.6 (Cp, Cpk, Pp, Ppk); ISO 22514-2 percentile index on a
    fitted lognormal; Bissell 1990 for the interval (see the module notes).
    """
    x = np.asarray(values, dtype=float)
    if x.ndim != 1 or x.size < 3 or not np.isfinite(x).all():
        raise ValueError(f"capability needs at least 3 finite values, got {x.size}")
    if usl is None and lsl is None:
        raise ValueError("capability needs a specification limit (usl and/or lsl)")
    if usl is not None and lsl is not None and usl <= lsl:
        raise ValueError(f"upper limit {usl} must exceed lower limit {lsl}")
    n, mu = x.size, float(x.mean())
    s_o = float(x.std(ddof=1))
    s_w = sigma_within if sigma_within is not None else float(np.abs(np.diff(x)).mean() / k.d2(2))
    if s_w <= 0 or s_o <= 0:
        raise ValueError("the values do not vary: capability is undefined")
    up = (usl - mu) / 3 if usl is not None else None
    dn = (mu - lsl) / 3 if lsl is not None else None
    both = usl is not None and lsl is not None
    cp = (usl - lsl) / (6 * s_w) if usl is not None and lsl is not None else None
    pp = (usl - lsl) / (6 * s_o) if both and usl is not None and lsl is not None else None
    cpk = min(v for v in (up, dn) if v is not None) / s_w
    ppk = min(v for v in (up, dn) if v is not None) / s_o
    pct = None
    note = "two-sided normal indices"
    if lsl is None or lsl <= 0 <= x.min():
        note = "one-sided upper index (Cpu) for a zero-bounded metric"
        if usl is not None and x.min() > 0:
            from scipy import stats  # the lognormal fit: only for a skewed sample

            shape, loc, scale = stats.lognorm.fit(x, floc=0)
            x50 = stats.lognorm.ppf(0.5, shape, loc, scale)
            x99 = stats.lognorm.ppf(0.99865, shape, loc, scale)
            pct = float((usl - x50) / (x99 - x50))
            note += "; ISO 22514-2 percentile index on a fitted lognormal"
    return Capability(
        n,
        mu,
        s_w,
        s_o,
        cp,
        float(cpk),
        pp,
        float(ppk),
        bissell_ci(float(cpk), n, confidence),
        pct,
        note,
    )
