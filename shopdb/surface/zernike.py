"""Zernike polynomials: index converters, orthonormal evaluation, annular polynomials.

Terms are keyed by (n, m): radial order n >= 0, azimuthal frequency m with |m| <= n and
n - |m| even; m >= 0 is the cos(m theta) term, m < 0 the sin(|m| theta) term.

Notes
-----
Normalisation is orthonormal over the unit disk, area-averaged (ANSI Z80.28 / ISO 24157):
``Z_n^m = N_n^m R_n^|m|(rho) {cos|sin}(|m| theta)`` with ``N = sqrt(2 (n + 1) / (1 + delta_m0))``,
so a coefficient is the RMS (in nm) its term contributes over the full disk.

The radial polynomial is evaluated through its Jacobi form
``R_n^m(rho) = rho^m P_k^(0, m)(2 rho^2 - 1)``, ``k = (n - m) / 2`` (Born & Wolf, Principles of
Optics, 7th ed., §9.2.1 and App. VII), using the three-term recurrence of Jacobi polynomials
(DLMF 18.9.2). It is stable to high order, unlike the explicit factorial sum, which loses all
digits near rho = 1 beyond n ~ 40 in float64.

Annular Zernike polynomials (Mahajan, J. Opt. Soc. Am. 71(1):75, 1981) are orthonormal over the
annulus eps <= rho <= 1; for each m their radial parts are the Gram-Schmidt orthonormalisation of
rho^m, rho^(m+2), ... under the weight rho on [eps, 1], which is done here exactly with
Gauss-Legendre quadrature (polynomial integrands).
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

# Names of the low orders (common practice in optical testing).
NAMES: dict[tuple[int, int], str] = {
    (0, 0): "piston",
    (1, -1): "tilt y",
    (1, 1): "tilt x",
    (2, -2): "astigmatism 45°",
    (2, 0): "defocus (power)",
    (2, 2): "astigmatism 0°",
    (3, -3): "trefoil y",
    (3, -1): "coma y",
    (3, 1): "coma x",
    (3, 3): "trefoil x",
    (4, -4): "tetrafoil y",
    (4, -2): "secondary astigmatism 45°",
    (4, 0): "primary spherical",
    (4, 2): "secondary astigmatism 0°",
    (4, 4): "tetrafoil x",
    (5, -1): "secondary coma y",
    (5, 1): "secondary coma x",
    (6, 0): "secondary spherical",
}


def _check_nm(n: int, m: int) -> None:
    if n < 0 or abs(m) > n or (n - m) % 2:
        raise ValueError(
            f"Zernike index (n={n}, m={m}) is invalid: need n >= 0, |m| <= n, n - m even"
        )


def ansi_to_nm(j: int) -> tuple[int, int]:
    """ANSI Z80.28 / ISO 24157 single index (from 0) to (n, m).

    Notes
    -----
    ANSI Z80.28 / ISO 24157: j = (n(n + 2) + m) / 2, so n = ceil((-3 + sqrt(9 + 8j)) / 2)
    and m = 2j - n(n + 2) (shared/REFERENCES.md).
    """
    if j < 0:
        raise ValueError(f"ANSI Zernike index {j} is negative; it starts at 0")
    n = math.ceil((-3 + math.sqrt(9 + 8 * j)) / 2)
    return n, 2 * j - n * (n + 2)


def nm_to_ansi(n: int, m: int) -> int:
    """(n, m) to the ANSI Z80.28 / ISO 24157 single index (from 0).

    Notes
    -----
    ANSI Z80.28 / ISO 24157 single index j = (n(n + 2) + m) / 2, from 0.
    """
    _check_nm(n, m)
    return (n * (n + 2) + m) // 2


def nm_to_noll(n: int, m: int) -> int:
    """(n, m) to Noll's index (J. Opt. Soc. Am. 66(3):207, 1976), starting at 1.

    Within radial order n, terms run by increasing |m|; for m != 0 an even index is the cos
    term (m > 0) and an odd index the sin term (m < 0).

    Notes
    -----
    Noll, J. Opt. Soc. Am. 66(3):207 (1976).
    """
    _check_nm(n, m)
    j0 = n * (n + 1) // 2  # indices before this order
    am = abs(m)
    # position of the pair for |m| within the order
    first = j0 + 1 + (am if n % 2 == 0 else am - 1)  # lowest index used by |m| (pair start)
    if m == 0:
        return first
    # the pair (first, first + 1) when m != 0 and n even; for n odd the pair starts at `first`
    pair = (first - 1, first) if n % 2 == 0 else (first, first + 1)
    even, odd = (pair[0], pair[1]) if pair[0] % 2 == 0 else (pair[1], pair[0])
    return even if m > 0 else odd


def noll_to_nm(j: int) -> tuple[int, int]:
    """Noll's index (from 1) to (n, m).

    Notes
    -----
    Noll, J. Opt. Soc. Am. 66(3):207 (1976); the inverse of :func:`nm_to_noll`.
    """
    if j < 1:
        raise ValueError(f"Noll Zernike index {j} is invalid; it starts at 1")
    n = 0
    while (n + 1) * (n + 2) // 2 < j:
        n += 1
    for m in range(-n, n + 1, 2):
        if nm_to_noll(n, m) == j:
            return n, m
    raise AssertionError("unreachable")  # pragma: no cover


def terms_up_to(order: int) -> list[tuple[int, int]]:
    """All (n, m) with n <= order in ANSI order; (order + 1)(order + 2)/2 terms.

    Notes
    -----
    ANSI Z80.28 / ISO 24157 order; (order + 1)(order + 2) / 2 terms.
    """
    if order < 0:
        raise ValueError(f"Zernike order {order} is negative")
    return [ansi_to_nm(j) for j in range((order + 1) * (order + 2) // 2)]


def name(n: int, m: int) -> str:
    """The term's name in words (common practice in optical testing), or ``Z(n,m)``.

    Notes
    -----
    Names of the low orders as optical testing uses them (common practice).
    """
    return NAMES.get((n, m), f"Z({n},{m})")


def key(n: int, m: int) -> str:
    """The text key ``"n,m"`` under which coefficients are kept in JSON records.

    Notes
    -----
    A text form of (n, m) for JSON records; (n, m) is the identifier (ANSI Z80.28 / ISO
    24157).

    Examples
    --------
    >>> key(3, -1)
    '3,-1'
    >>> parse_key(key(3, -1))
    (3, -1)
    """
    _check_nm(n, m)
    return f"{n},{m}"


def parse_key(text: str) -> tuple[int, int]:
    """(n, m) from a ``"n,m"`` key; ValueError naming the key when it is not a valid term.

    Notes
    -----
    The inverse of :func:`key`; n >= 0, |m| <= n, n - m even (ANSI Z80.28 / ISO 24157).
    """
    parts = str(text).split(",")
    try:
        n, m = (int(p.strip()) for p in parts)
    except ValueError:
        raise ValueError(f"Zernike key {text!r} is not 'n,m' (e.g. '2,0')") from None
    _check_nm(n, m)
    return n, m


def norm(n: int, m: int) -> float:
    """Normalisation of the orthonormal term (n, m).

    Notes
    -----
    N = sqrt(2 (n + 1) / (1 + delta_m0)): orthonormal over the unit disk, area-averaged (ANSI
    Z80.28 / ISO 24157; Noll 1976).
    """
    return math.sqrt(2 * (n + 1) / (1 + (m == 0)))


def _jacobi_all(k_max: int, beta: int, x: np.ndarray):
    """P_k^(0, beta)(x) for k = 0 .. k_max by the three-term recurrence DLMF 18.9.2 (alpha = 0)."""
    p_prev = np.ones_like(x)
    yield p_prev
    if k_max == 0:
        return
    b = float(beta)
    p = 1 + (b + 2) * (x - 1) / 2
    yield p
    for i in range(2, k_max + 1):
        c = 2 * i + b
        a1 = 2 * i * (i + b) * (c - 2)
        # (c - 1) (c (c - 2) x - b^2) P_{i-1} - 2 (i - 1)(i + b - 1) c P_{i-2}, all over a1
        p_prev, p = (
            p,
            ((c - 1) * (c * (c - 2) * x - b * b) * p - 2 * (i - 1) * (i + b - 1) * c * p_prev) / a1,
        )
        yield p


def radial(n: int, m: int, rho: np.ndarray) -> np.ndarray:
    """Un-normalised radial polynomial R_n^|m|(rho) (R(1) = 1).

    Notes
    -----
    Jacobi form R_n^m(rho) = rho^m P_k^(0, m)(2 rho^2 - 1), k = (n - m) / 2 (Born & Wolf,
    Principles of Optics, 7th ed., §9.2.1), by the three-term recurrence (DLMF 18.9.2).
    """
    _check_nm(n, m)
    am = abs(m)
    rho = np.asarray(rho, dtype=float)
    *_, p = _jacobi_all((n - am) // 2, am, 2 * rho * rho - 1)
    return rho**am * p


def radial_factorial(n: int, m: int, rho: np.ndarray) -> np.ndarray:
    """R_n^|m| from the explicit factorial sum (reference for tests; unstable at high n).

    Notes
    -----
    The explicit sum R_n^m = sum_k (-1)^k (n - k)! / (k! ((n + m)/2 - k)! ((n - m)/2 - k)!)
    rho^(n - 2k) (Born & Wolf §9.2.1; shared/REFERENCES.md); kept as a check of :func:`radial`.
    """
    am = abs(m)
    rho = np.asarray(rho, dtype=float)
    out = np.zeros_like(rho)
    for k in range((n - am) // 2 + 1):
        coef = (
            (-1) ** k
            * math.factorial(n - k)
            / (
                math.factorial(k)
                * math.factorial((n + am) // 2 - k)
                * math.factorial((n - am) // 2 - k)
            )
        )
        out += coef * rho ** (n - 2 * k)
    return out


def zernike(n: int, m: int, rho: np.ndarray, theta: np.ndarray) -> np.ndarray:
    """Orthonormal Zernike term Z_n^m at polar coordinates (rho, theta in radians).

    Notes
    -----
    Z_n^m = N R_n^|m|(rho) cos(m theta) (m >= 0) or sin(|m| theta) (m < 0), orthonormal (ANSI
    Z80.28 / ISO 24157).
    """
    r = norm(n, m) * radial(n, m, rho)
    if m > 0:
        return r * np.cos(m * np.asarray(theta))
    if m < 0:
        return r * np.sin(-m * np.asarray(theta))
    return r


def basis(
    terms: list[tuple[int, int]], rho: np.ndarray, theta: np.ndarray, *, dtype=np.float64
) -> np.ndarray:
    """Stack of orthonormal terms, shape (len(terms), *rho.shape).

    Radial parts are shared between m and -m, and cos/sin(m theta) come from the Chebyshev
    recurrence cos((m+1)t) = 2 cos t cos(m t) - cos((m-1) t), so each term costs a few
    multiply-adds per pixel. Points are taken in blocks, which bounds the working memory of the
    recurrences on large grids.

    Notes
    -----
    The terms of :func:`zernike` stacked (terms x points).
    """
    rho = np.asarray(rho, dtype=float)
    theta = np.broadcast_to(np.asarray(theta, dtype=float), rho.shape)
    out = np.empty((len(terms), *rho.shape), dtype=dtype)
    flat_out = out.reshape(len(terms), -1)
    flat_rho, flat_theta = rho.reshape(-1), theta.reshape(-1)
    for s in range(0, flat_rho.size, _BLOCK):
        sl = slice(s, s + _BLOCK)
        th = flat_theta[sl]
        fill_basis(flat_out[:, sl], terms, flat_rho[sl], np.cos(th), np.sin(th))
    return out


_BLOCK = 1 << 16  # points per block of basis()


def fill_basis(
    out: np.ndarray, terms, rho: np.ndarray, cos_t: np.ndarray, sin_t: np.ndarray
) -> None:
    """Write the terms at points given by rho and cos/sin(theta) into the rows of ``out``
    (1-D points; rows may be views into a larger array).

    Notes
    -----
    Radial parts by the Jacobi recurrence (DLMF 18.9.2) shared between terms of one |m|;
    cos and sin of m theta by Chebyshev recurrences (DLMF 18.9.1).
    """
    rows: dict[tuple[int, int], list[tuple[int, int]]] = {}  # (n, |m|) -> [(row, m)]
    need: dict[int, int] = {}  # |m| -> highest Jacobi degree
    for i, (n, m) in enumerate(terms):
        rows.setdefault((n, abs(m)), []).append((i, m))
        need[abs(m)] = max(need.get(abs(m), 0), (n - abs(m)) // 2)
    trig = (np.ones_like(rho), np.zeros_like(rho))  # cos, sin of (|m| theta)
    trig_prev = trig
    x = 2 * rho * rho - 1
    rho_m = np.ones_like(rho)
    for am in range(max(need, default=-1) + 1):
        if am == 1:
            trig_prev, trig = trig, (cos_t, sin_t)
        elif am > 1:
            (c1, s1), (c0, s0) = trig, trig_prev
            trig_prev, trig = trig, (2 * cos_t * c1 - c0, 2 * cos_t * s1 - s0)
        if am:
            rho_m = rho_m * rho
        if am not in need:
            continue
        for k, p in enumerate(_jacobi_all(need[am], am, x)):
            n = am + 2 * k
            if (n, am) not in rows:
                continue
            r = rho_m * p
            r *= norm(n, am)  # the same for +m and -m
            for i, m in rows[(n, am)]:
                if m == 0:
                    out[i] = r
                else:
                    np.multiply(r, trig[0] if m > 0 else trig[1], out=out[i])


@lru_cache(maxsize=64)
def _annular_radial_coefficients(n_max: int, am: int, eps: float) -> np.ndarray:
    """Coefficients (in powers rho^(am + 2i)) of the annular radial polynomials for one |m|.

    Row k holds the polynomial of radial order am + 2k, normalised so that
    (1/area) * integral over the annulus of (N R cos)^2 = 1 with the ANSI normalisation N.
    """
    count = (n_max - am) // 2 + 1
    # Gauss-Legendre nodes on [eps, 1], exact for the polynomial integrands used here.
    x, w = np.polynomial.legendre.leggauss(n_max + 4)
    r = (1 - eps) / 2 * x + (1 + eps) / 2
    w = w * (1 - eps) / 2 * r  # weight rho d rho
    powers = np.array([r ** (am + 2 * i) for i in range(count)])  # monomials
    coefs = np.eye(count)
    area_norm = (1 - eps**2) / 2  # integral of rho d rho over [eps, 1]
    for k in range(count):
        v = coefs[k] @ powers
        for j in range(k):
            u = coefs[j] @ powers
            coefs[k] = coefs[k] - (np.sum(w * v * u) / area_norm) * coefs[j]
            v = coefs[k] @ powers
        # normalise so the radial part has mean square 1 over the annulus; the sign makes R(1) > 0
        ms = np.sum(w * v * v) / area_norm
        coefs[k] = coefs[k] / math.sqrt(ms)
        if coefs[k] @ np.ones(count) < 0:
            coefs[k] = -coefs[k]
    return coefs


def annular_zernike(n: int, m: int, rho: np.ndarray, theta: np.ndarray, eps: float) -> np.ndarray:
    """Orthonormal annular Zernike term (Mahajan 1981) over eps <= rho <= 1.

    With eps = 0 it equals :func:`zernike`. The azimuthal part carries sqrt(2) for m != 0 so the
    term is orthonormal (area-averaged) over the annulus.

    Notes
    -----
    Mahajan, J. Opt. Soc. Am. 71(1):75 (1981): orthonormal over eps <= rho <= 1 (see the
    module notes for the Gram-Schmidt construction).
    """
    _check_nm(n, m)
    if not 0 <= eps < 1:
        raise ValueError(f"obscuration ratio {eps} must be in [0, 1)")
    am = abs(m)
    coefs = _annular_radial_coefficients(n, am, float(eps))[(n - am) // 2]
    rho = np.asarray(rho, dtype=float)
    rr = rho * rho
    poly = np.zeros_like(rho)
    for c in coefs[::-1]:  # Horner in rho^2
        poly = poly * rr + c
    r = poly * rho**am
    if m > 0:
        return math.sqrt(2) * r * np.cos(m * np.asarray(theta))
    if m < 0:
        return math.sqrt(2) * r * np.sin(am * np.asarray(theta))
    return r


def annular_basis(
    terms: list[tuple[int, int]],
    rho: np.ndarray,
    theta: np.ndarray,
    eps: float,
    *,
    dtype=np.float64,
) -> np.ndarray:
    """Annular Zernike terms (terms x points) at (rho, theta) for obscuration ``eps``.

    Notes
    -----
    Mahajan, J. Opt. Soc. Am. 71(1):75 (1981); the terms of :func:`annular_zernike` stacked.
    """
    out = np.empty((len(terms), *np.shape(rho)), dtype=dtype)
    for i, (n, m) in enumerate(terms):
        out[i] = annular_zernike(n, m, rho, theta, eps)
    return out
