"""How an uncertain reference surface moves each measured quantity: the reference calibration's
standard uncertainty per Zernike term propagated to sagitta, PV-type and RMS-type quantities.

Notes
-----
The measured map is the part plus the residual error of the reference after its calibration is
subtracted, delta(x) = sum_j e_j Z_j(x) with independent e_j of standard uncertainty u_j (the
calibration's per-term uncertainties; orthonormal terms, ANSI Z80.28 / ISO 24157). By the law of
propagation (JCGM 100:2008 §5.1.2):

* sagitta, 2 sqrt(3) c(2,0): u = 2 sqrt(3) u(2,0) (linear, exact), scaled by (d / D)^2 over a
  test field of diameter d in an aperture D;
* an RMS over the aperture after removing some terms: the quantity changes to first order by the
  RMS of delta's kept terms, u = sqrt(sum over kept terms of u_j^2) (the terms are orthonormal);
* a PV, y = z(p) - z(v) at its peak p and valley v: c_j = Z_j(p) - Z_j(v), u^2 = sum c_j^2 u_j^2
  over the kept terms (the extrema do not move to first order); where p and v are not known (a
  test field's worst sub-aperture) the bound u <= 2 max_x sqrt(sum Z_j(x)^2 u_j^2) over the
  aperture is used. PV is not linear in the map: tests/spc/test_uncertainty.py checks this
  linearisation against a Monte Carlo propagation (JCGM 101:2008).
"""

from __future__ import annotations

import math

import numpy as np

from shopdb.surface import zernike

SPHERE = ((0, 0), (1, -1), (1, 1), (2, 0))
PISTON_TILT = ((0, 0), (1, -1), (1, 1))
_REMOVED = {
    "rmst": PISTON_TILT,
    "rmsi": SPHERE,
    "rmsa": SPHERE,
    "irregularity": SPHERE,
    "pv": PISTON_TILT,
    "pvr": PISTON_TILT,
}


def kept(field: str, term_u: dict[tuple[int, int], float]) -> dict[tuple[int, int], float]:
    """The per-term uncertainties that move ``field`` (the terms it does not remove).

    Notes
    -----
    ISO 14999-4:2015 §3: RMSt after piston and tilt, RMSi and the irregularity after the best-fit
    sphere, RMSa without the rotationally symmetric part (m = 0); RSI is the m = 0, n >= 4 part.
    """
    if field == "rsi":
        return {t: u for t, u in term_u.items() if t[1] == 0 and t[0] >= 4}
    if field == "rmsa":
        return {t: u for t, u in term_u.items() if t not in SPHERE and t[1] != 0}
    removed = _REMOVED.get(field, PISTON_TILT)
    return {t: u for t, u in term_u.items() if t not in removed}


def pv_u(
    term_u: dict[tuple[int, int], float],
    peak: tuple[float, float],
    valley: tuple[float, float],
) -> float:
    """Standard uncertainty of a PV whose peak and valley lie at (rho, theta) ``peak`` and
    ``valley``: sqrt(sum (Z_j(p) - Z_j(v))^2 u_j^2).

    Notes
    -----
    JCGM 100:2008 §5.1.2 (law of propagation) with c_j = dPV/de_j = Z_j(p) - Z_j(v).

    Examples
    --------
    Defocus of 1 nm standard uncertainty, peak at the edge and valley at the centre: Z(2,0) is
    sqrt(3) at the edge and -sqrt(3) at the centre, so u(PV) = 2 sqrt(3) nm.

    >>> round(pv_u({(2, 0): 1.0}, (1.0, 0.0), (0.0, 0.0)), 4)
    3.4641
    """
    total = 0.0
    for (n, m), u in term_u.items():
        zp = float(zernike.zernike(n, m, np.array([peak[0]]), np.array([peak[1]]))[0])
        zv = float(zernike.zernike(n, m, np.array([valley[0]]), np.array([valley[1]]))[0])
        total += ((zp - zv) * u) ** 2
    return math.sqrt(total)


def pv_u_bound(term_u: dict[tuple[int, int], float], *, samples: int = 129) -> float:
    """An upper bound of a PV's standard uncertainty when its peak and valley are not known:
    2 max_x sqrt(sum Z_j(x)^2 u_j^2) over the unit disk.

    Notes
    -----
    var(delta(p) - delta(v)) <= (sigma(p) + sigma(v))^2 <= 4 max sigma^2 (Cauchy-Schwarz on the
    covariance of two values of the same random map).
    """
    if not term_u:
        return 0.0
    y, x = np.mgrid[-1 : 1 : samples * 1j, -1 : 1 : samples * 1j]
    rho, theta = np.hypot(x, y), np.arctan2(y, x)
    inside = rho <= 1
    rho, theta = rho[inside], theta[inside]
    var = np.zeros(rho.shape)
    for (n, m), u in term_u.items():
        var += (zernike.zernike(n, m, rho, theta) * u) ** 2
    return float(2 * math.sqrt(var.max()))


def rms_u(term_u: dict[tuple[int, int], float]) -> float:
    """Standard uncertainty of an RMS over the aperture moved by terms of uncertainty u_j:
    sqrt(sum u_j^2).

    Notes
    -----
    Orthonormal terms (ANSI Z80.28 / ISO 24157): the RMS of sum e_j Z_j is sqrt(sum e_j^2), and
    an RMS changes to first order by at most the RMS of what is added.
    """
    return math.sqrt(sum(u * u for u in term_u.values()))


def reference_u(
    field: str,
    term_u: dict[tuple[int, int], float],
    *,
    extrema: tuple[tuple[float, float], tuple[float, float]] | None = None,
    aperture_scale: float = 1.0,
) -> float | None:
    """The reference's contribution to a callout field's standard uncertainty (see the module
    notes); ``aperture_scale`` is (d / D)^2 for a test field; None for a field the reference
    does not move in this model (slope).

    Notes
    -----
    JCGM 100:2008 §5.1.2; the quantities of ISO 10110-5:2015 §4 / ISO 14999-4:2015 §3.
    """
    if field == "sag":
        return 2 * math.sqrt(3) * term_u.get((2, 0), 0.0) * aperture_scale
    if field == "slope":
        return None
    terms = kept(field, term_u)
    if field in ("rmst", "rmsi", "rmsa") or field.startswith("band"):
        return rms_u(terms)
    if extrema is not None:
        return pv_u(terms, *extrema)
    return pv_u_bound(terms)
