"""Control charts: each returns a per-point table (pandas DataFrame), one row per observation.

Columns: ``index``, ``time``, ``value``, ``statistic`` (what is plotted), ``centre``, ``ucl``,
``lcl``, ``sigma``, ``zone`` (C within 1 sigma, B 1-2, A 2-3, out beyond 3; None without
limits), ``phase``, ``baseline`` (the point helped estimate its phase's limits), ``rules``
(codes that fire at the point), ``explanation`` (the same in plain words) and ``signal``
(deterioration / improvement / "" given the improvement direction).

Limits are estimated per phase from that phase's baseline (Phase I) — the first ``baseline``
points of the phase, or all of them — optionally removing baseline points beyond 3 sigma and
re-estimating until none remain; later points of the phase are judged against those frozen
limits (Phase II). ``frozen`` supplies limits outright. A recorded process change starts a new
phase.

Notes
-----
- Individuals and moving range (I-MR): centre x-bar, sigma = MR-bar / d2(2), limits
  x-bar +- 3 sigma; UCL_MR = D4(2) MR-bar (NIST/SEMATECH e-Handbook §6.3.2.2).
- X-bar/R and X-bar/S: limits x-double-bar +- A2 R-bar or +- A3 s-bar (Montgomery §6.2-6.3).
- EWMA: z_i = lambda x_i + (1 - lambda) z_(i-1), z_0 = target; exact limits
  target +- L sigma sqrt(lambda / (2 - lambda) (1 - (1 - lambda)^(2 i))) (Lucas & Saccucci,
  Technometrics 32(1), 1990; NIST §6.3.2.4). Defaults lambda = 0.2, L = 3 (Montgomery §9.2).
- Tabular CUSUM: S_hi = max(0, S_hi + x - target - K), S_lo = max(0, S_lo + target - K - x),
  signal when either exceeds H (NIST §6.3.2.3, Montgomery §9.1); defaults K = 0.5 sigma,
  H = 5 sigma (Montgomery's usual design, ARL0 about 465).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import pandas as pd

from shopdb.spc import constants as k
from shopdb.spc import rules as R

DIRECTIONS = ("lower", "higher", "none")


def _phases(n: int, phases) -> np.ndarray:
    if phases is None:
        return np.zeros(n, dtype=object)
    p = np.asarray(phases, dtype=object)
    if p.shape != (n,):
        raise ValueError(f"phases must have one label per point ({n}), got {p.shape}")
    return p


def _segments(labels: np.ndarray) -> list[np.ndarray]:
    """Index arrays of consecutive runs with the same phase label."""
    if labels.size == 0:
        return []
    cuts = np.flatnonzero(labels[1:] != labels[:-1]) + 1
    return np.split(np.arange(labels.size), cuts)


def _zone(z: float) -> str | None:
    if not np.isfinite(z):
        return None
    a = abs(z)
    return "C" if a < 1 else "B" if a < 2 else "A" if a <= 3 else "out"


def _signal(codes: list[str], z: float, trend: float, direction: str) -> str:
    if not codes or direction == "none":
        return ""
    if set(codes) <= {"N4", "N7"}:
        return ""
    side = trend if codes == ["N3"] else z
    worse = side > 0 if direction == "lower" else side < 0
    return "deterioration" if worse else "improvement"


def _table(
    values,
    statistic,
    centre,
    sigma,
    ucl,
    lcl,
    labels,
    baseline_mask,
    times,
    rule_set,
    direction,
    z_for_rules=None,
    fired_override=None,
) -> pd.DataFrame:
    n = len(values)
    with np.errstate(invalid="ignore", divide="ignore"):
        z = (statistic - centre) / sigma if z_for_rules is None else z_for_rules
    fired: list[list[str]] = [[] for _ in range(n)]
    if fired_override is not None:
        fired = fired_override
    elif rule_set:
        # rules run within each phase: a run does not continue across a process change
        for seg in _segments(labels):
            for i, codes in zip(seg, R.evaluate(z[seg], rule_set), strict=True):
                fired[i] = codes
    trend = np.diff(statistic, prepend=statistic[:1])
    return pd.DataFrame(
        {
            "index": np.arange(n),
            "time": list(times) if times is not None else [None] * n,
            "value": np.asarray(values, float),
            "statistic": statistic,
            "centre": centre,
            "ucl": ucl,
            "lcl": lcl,
            "sigma": sigma,
            "zone": [_zone(v) for v in z],
            "phase": labels,
            "baseline": baseline_mask,
            "rules": fired,
            "explanation": [R.describe(c) for c in fired],
            "signal": [
                _signal(c, zi, t, direction) for c, zi, t in zip(fired, z, trend, strict=True)
            ],
        }
    )


def _check_values(values, name="values") -> np.ndarray:
    v = np.asarray(values, dtype=float)
    if v.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional, got shape {v.shape}")
    if not np.isfinite(v).all():
        raise ValueError(f"{name} hold NaN or infinite entries")
    return v


def _check_direction(direction: str) -> None:
    if direction not in DIRECTIONS:
        raise ValueError(
            f"improvement direction {direction!r} is not one of {', '.join(DIRECTIONS)}"
        )


def _imr_estimate(x: np.ndarray) -> tuple[float, float, float]:
    """(centre, sigma, MR-bar) from individuals (NIST §6.3.2.2)."""
    mr = np.abs(np.diff(x))
    mr_bar = float(mr.mean()) if mr.size else float("nan")
    return float(x.mean()), mr_bar / k.d2(2), mr_bar


def individuals(
    values: Sequence[float],
    *,
    times=None,
    phases=None,
    baseline: int | None = None,
    iterate: bool = False,
    frozen: dict | None = None,
    rule_set: str = "nelson",
    direction: str = "lower",
) -> pd.DataFrame:
    """I-MR chart. Extra columns: ``mr``, ``mr_centre``, ``mr_ucl`` (moving range of successive points).

    Notes
    -----
    NIST/SEMATECH e-Handbook §6.3.2.2: centre x-bar, sigma = MR-bar / d2(2), limits +- 3
    sigma, UCL_MR = D4(2) MR-bar.
    """
    x = _check_values(values)
    _check_direction(direction)
    n = x.size
    labels = _phases(n, phases)
    centre, sigma, mr_c = (np.full(n, np.nan) for _ in range(3))
    base = np.zeros(n, bool)
    for seg in _segments(labels):
        if frozen is not None:
            c, s = float(frozen["centre"]), float(frozen["sigma"])
            m = s * k.d2(2)
        else:
            nb = seg.size if baseline is None else min(baseline, seg.size)
            if nb < 2:
                continue
            use = np.ones(nb, bool)
            while True:
                xb = x[seg[:nb]]
                c = float(xb[use].mean())
                # moving ranges only between successive baseline points both kept
                pairs = use[1:] & use[:-1]
                mrs = np.abs(np.diff(xb))[pairs]
                if mrs.size == 0:
                    break
                m = float(mrs.mean())
                s = m / k.d2(2)
                out = use & (np.abs(xb - c) > 3 * s)
                if not iterate or not out.any() or use.sum() - out.sum() < 2:
                    break
                use &= ~out
            base[seg[:nb]] = use
        centre[seg], sigma[seg], mr_c[seg] = c, s, m
    table = _table(
        x,
        x.copy(),
        centre,
        sigma,
        centre + 3 * sigma,
        centre - 3 * sigma,
        labels,
        base,
        times,
        rule_set,
        direction,
    )
    mr = np.abs(np.diff(x, prepend=np.nan))
    for seg in _segments(labels):
        mr[seg[0]] = np.nan  # no moving range across a phase change
    table["mr"] = mr
    table["mr_centre"] = mr_c
    table["mr_ucl"] = k.d4_factor(2) * mr_c
    return table


def xbar(
    subgroups: Sequence[Sequence[float]],
    *,
    spread: str = "range",
    times=None,
    phases=None,
    baseline: int | None = None,
    rule_set: str = "nelson",
    direction: str = "lower",
) -> pd.DataFrame:
    """X-bar chart with R (``spread="range"``) or S (``"sd"``) estimates; extra columns for the
    spread chart: ``spread``, ``spread_centre``, ``spread_ucl``, ``spread_lcl``. Subgroups of equal size.

    Notes
    -----
    Montgomery, Introduction to Statistical Quality Control, §6.2-6.3: limits x-double-bar +-
    A2 R-bar or +- A3 s-bar.
    """
    g = np.asarray(subgroups, dtype=float)
    if g.ndim != 2 or g.shape[1] < 2:
        raise ValueError(f"subgroups must be a k x n array with n >= 2, got shape {g.shape}")
    if not np.isfinite(g).all():
        raise ValueError("subgroups hold NaN or infinite entries")
    if spread not in ("range", "sd"):
        raise ValueError(f"spread {spread!r} is not 'range' or 'sd'")
    _check_direction(direction)
    m, n = g.shape
    means = g.mean(axis=1)
    spreads = np.ptp(g, axis=1) if spread == "range" else g.std(axis=1, ddof=1)
    labels = _phases(m, phases)
    centre, sigma, sc, sucl, slcl = (np.full(m, np.nan) for _ in range(5))
    base = np.zeros(m, bool)
    for seg in _segments(labels):
        nb = seg.size if baseline is None else min(baseline, seg.size)
        xbb = float(means[seg[:nb]].mean())
        sbar = float(spreads[seg[:nb]].mean())
        if spread == "range":
            s = sbar / k.d2(n)
            sc[seg], sucl[seg], slcl[seg] = sbar, k.d4_factor(n) * sbar, k.d3_factor(n) * sbar
        else:
            s = sbar / k.c4(n)
            sc[seg], sucl[seg], slcl[seg] = sbar, k.b4(n) * sbar, k.b3(n) * sbar
        centre[seg], sigma[seg] = xbb, s / math.sqrt(n)
        base[seg[:nb]] = True
    t = _table(
        means,
        means.copy(),
        centre,
        sigma,
        centre + 3 * sigma,
        centre - 3 * sigma,
        labels,
        base,
        times,
        rule_set,
        direction,
    )
    t["spread"], t["spread_centre"], t["spread_ucl"], t["spread_lcl"] = spreads, sc, sucl, slcl
    return t


def ewma(
    values: Sequence[float],
    *,
    target: float | None = None,
    sigma: float | None = None,
    lam: float = 0.2,
    L: float = 3.0,
    times=None,
    baseline: int | None = None,
    direction: str = "lower",
) -> pd.DataFrame:
    """EWMA chart with exact time-varying limits; target and sigma default to the baseline's mean
    and MR-bar / d2. The only rule is a statistic beyond its limits (code ``EWMA``).

    Notes
    -----
    Lucas & Saccucci, Technometrics 32(1):1 (1990); NIST/SEMATECH e-Handbook §6.3.2.4
    (exact time-varying limits).
    """
    x = _check_values(values)
    _check_direction(direction)
    if not 0 < lam <= 1:
        raise ValueError(f"EWMA lambda must be in (0, 1], got {lam}")
    nb = x.size if baseline is None else min(baseline, x.size)
    if target is None or sigma is None:
        if nb < 2:
            raise ValueError("EWMA needs a target and sigma, or at least 2 baseline points")
        c, s, _ = _imr_estimate(x[:nb])
        target = c if target is None else target
        sigma = s if sigma is None else sigma
    z = np.empty_like(x)
    prev = target
    for i, v in enumerate(x):
        prev = lam * v + (1 - lam) * prev
        z[i] = prev
    steps = np.arange(1, x.size + 1)
    half = L * sigma * np.sqrt(lam / (2 - lam) * (1 - (1 - lam) ** (2 * steps)))
    ucl, lcl = target + half, target - half
    fired = [["EWMA"] if (zi > u or zi < lo) else [] for zi, u, lo in zip(z, ucl, lcl, strict=True)]
    zz = (z - target) / (half / L)
    return _table(
        x,
        z,
        np.full(x.size, target),
        half / L,
        ucl,
        lcl,
        _phases(x.size, None),
        np.arange(x.size) < nb,
        times,
        None,
        direction,
        z_for_rules=zz,
        fired_override=fired,
    )


def cusum(
    values: Sequence[float],
    *,
    target: float,
    sigma: float,
    k_sigma: float = 0.5,
    h_sigma: float = 5.0,
    times=None,
    direction: str = "lower",
) -> pd.DataFrame:
    """Tabular CUSUM. ``statistic`` is S_hi, with ``s_lo`` in an extra column; ``ucl`` = H.
    Fires ``CUSUM+`` / ``CUSUM-`` where S_hi / S_lo exceed H.

    Notes
    -----
    NIST/SEMATECH e-Handbook §6.3.2.3; Montgomery §9.1 (tabular CUSUM, K = 0.5 sigma,
    H = 5 sigma).
    """
    x = _check_values(values)
    _check_direction(direction)
    if not sigma > 0:
        raise ValueError(f"CUSUM sigma must be > 0, got {sigma}")
    K, H = k_sigma * sigma, h_sigma * sigma
    hi, lo = np.empty_like(x), np.empty_like(x)
    sh = sl = 0.0
    for i, v in enumerate(x):
        sh = max(0.0, sh + v - target - K)
        sl = max(0.0, sl + target - K - v)
        hi[i], lo[i] = sh, sl
    fired = [
        (["CUSUM+"] if a > H else []) + (["CUSUM-"] if b > H else [])
        for a, b in zip(hi, lo, strict=True)
    ]
    zz = np.where(hi >= lo, hi, -lo) / sigma
    t = _table(
        x,
        hi,
        np.zeros(x.size),
        np.full(x.size, sigma),
        np.full(x.size, H),
        np.zeros(x.size),
        _phases(x.size, None),
        np.zeros(x.size, bool),
        times,
        None,
        direction,
        z_for_rules=zz,
        fired_override=fired,
    )
    t["s_lo"] = lo
    t["zone"] = None
    return t


CHARTS = {"imr": individuals, "ewma": ewma, "cusum": cusum}


def episodes(fired: Sequence[Sequence[str]], *, gap: int = 3) -> list[tuple[int, int]]:
    """Consecutive signals grouped into episodes: (first, last) point index of each run of
    signalling points in which no more than ``gap`` quiet points separate two signals.

    Notes
    -----
    One assignable cause usually makes a chart fire at many successive points (a shift fires
    Nelson's test 2 at every point of the run); investigating and recording the cause once per
    episode, not per point, is common practice in SPC response plans (Montgomery, Introduction to
    Statistical Quality Control, §5.3, out-of-control action plans).

    Examples
    --------
    >>> episodes([[], ["N1"], [], ["N2"], [], [], [], [], ["N5"]], gap=3)
    [(1, 3), (8, 8)]
    """
    if gap < 0:
        raise ValueError(f"episode gap {gap} must be >= 0")
    out: list[tuple[int, int]] = []
    for i, codes in enumerate(fired):
        if not codes:
            continue
        if out and i - out[-1][1] - 1 <= gap:
            out[-1] = (out[-1][0], i)
        else:
            out.append((i, i))
    return out
