"""Control-chart constants computed from their definitions (not typed from a table).

Notes
-----
For n independent standard normal values (Montgomery, Introduction to Statistical Quality
Control, 7th ed., §6.2 and App. VI; ASTM E2587):

- d2(n) = E[range] = integral of 1 - Phi(x)^n - (1 - Phi(x))^n dx;
- d3(n) = sd[range], from E[range^2] = 2 * double integral over x < y of
  1 - Phi(y)^n - (1 - Phi(x))^n + (Phi(y) - Phi(x))^n;
- c4(n) = sqrt(2 / (n - 1)) Gamma(n / 2) / Gamma((n - 1) / 2);
- A2 = 3 / (d2 sqrt(n)), D3 = max(0, 1 - 3 d3 / d2), D4 = 1 + 3 d3 / d2,
  A3 = 3 / (c4 sqrt(n)), B3 = max(0, 1 - 3 sqrt(1 - c4^2) / c4), B4 = 1 + 3 sqrt(1 - c4^2) / c4.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

_X = np.linspace(-9.0, 9.0, 3601)
_ERF = np.frompyfunc(math.erf, 1, 1)


def _phi(x: np.ndarray) -> np.ndarray:
    """The standard normal CDF, (1 + erf(x / sqrt 2)) / 2."""
    return 0.5 * (1.0 + np.asarray(_ERF(x / math.sqrt(2.0)), dtype=float))


_H = _X[1] - _X[0]


def _check(n: int) -> None:
    if not (isinstance(n, int | np.integer) and n >= 2):
        raise ValueError(f"subgroup size must be an integer >= 2, got {n!r}")


@lru_cache(maxsize=64)
def d2(n: int) -> float:
    """d2(n): mean range of n standard normal values.

    Notes
    -----
    Montgomery App. VI; ASTM E2587: d2(n) = E[range of n standard normal values].
    """
    _check(n)
    p = _phi(_X)
    return float(np.trapezoid(1 - p**n - (1 - p) ** n, _X))


@lru_cache(maxsize=64)
def d3(n: int) -> float:
    """d3(n): standard deviation of that range.

    Notes
    -----
    Montgomery App. VI; ASTM E2587: d3(n) = standard deviation of that range.
    """
    _check(n)
    x = _X[::4]  # 0.02 spacing is ample for 4-digit constants
    h = x[1] - x[0]
    p = _phi(x)
    px, py = np.meshgrid(p, p, indexing="ij")  # px = Phi(x), py = Phi(y)
    f = 1 - py**n - (1 - px) ** n + np.clip(py - px, 0, None) ** n
    i, j = np.arange(x.size)[:, None], np.arange(x.size)[None, :]
    f = np.where(i < j, f, np.where(i == j, 0.5 * f, 0.0))  # x < y; the diagonal cells count half
    e_r2 = 2 * f.sum() * h * h
    return float(math.sqrt(e_r2 - d2(n) ** 2))


@lru_cache(maxsize=64)
def c4(n: int) -> float:
    """c4(n): bias of the sample standard deviation of n normal values.

    Notes
    -----
    c4(n) = sqrt(2 / (n - 1)) Gamma(n / 2) / Gamma((n - 1) / 2) (Montgomery App. VI).
    """
    _check(n)
    return float(math.sqrt(2 / (n - 1)) * math.exp(math.lgamma(n / 2) - math.lgamma((n - 1) / 2)))


def a2(n: int) -> float:
    """A2: X-bar chart limit factor on R-bar.

    Notes
    -----
    A2 = 3 / (d2 sqrt(n)) (Montgomery §6.2).
    """
    return 3 / (d2(n) * math.sqrt(n))


def d3_factor(n: int) -> float:
    """D3 (lower range-chart factor).

    Notes
    -----
    D3 = max(0, 1 - 3 d3 / d2) (Montgomery §6.2).
    """
    return max(0.0, 1 - 3 * d3(n) / d2(n))


def d4_factor(n: int) -> float:
    """D4 (upper range-chart factor).

    Notes
    -----
    D4 = 1 + 3 d3 / d2 (Montgomery §6.2).
    """
    return 1 + 3 * d3(n) / d2(n)


def a3(n: int) -> float:
    """A3: X-bar chart limit factor on s-bar.

    Notes
    -----
    A3 = 3 / (c4 sqrt(n)) (Montgomery §6.3).
    """
    return 3 / (c4(n) * math.sqrt(n))


def b3(n: int) -> float:
    """B3: lower S chart limit factor.

    Notes
    -----
    B3 = max(0, 1 - 3 sqrt(1 - c4^2) / c4) (Montgomery §6.3).
    """
    c = c4(n)
    return max(0.0, 1 - 3 * math.sqrt(1 - c * c) / c)


def b4(n: int) -> float:
    """B4: upper S chart limit factor.

    Notes
    -----
    B4 = 1 + 3 sqrt(1 - c4^2) / c4 (Montgomery §6.3).
    """
    c = c4(n)
    return 1 + 3 * math.sqrt(1 - c * c) / c
