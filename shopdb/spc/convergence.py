"""Run-to-run convergence of a part: how many more polishing runs to reach the tolerance?

Notes
-----
Deterministic polishing removes a roughly constant fraction of the remaining figure error per
run, down to a floor set by the process (metrology noise, tool mid-spatial ripple): the metric
after run i is modelled as y_i = f + A r^i (0 < r < 1 the convergence ratio, f >= 0 the floor),
so log(y - f) falls linearly with i (common practice in computer-controlled polishing; after
Jones, Appl. Opt. 16(1):218, 1977, removal = influence function x dwell). The fit is least
squares on log(y) (errors are relative); with fewer than four runs the floor is taken as zero.
The forecast of further runs to reach the tolerance T is the first i with f + A r^i <= T; its
interval is the 5-95 % range of a residual bootstrap of the fit (``n_boot`` resamples, seeded,
residuals inflated by sqrt(n / (n - p)) for the p fitted parameters); resampled fits that never
reach the tolerance count as infinitely many runs, so the upper end may be open. "not
converging" when the fitted r >= 1 or the floor is at or above T.
A stall is two successive runs each with ratio (after / before) above 0.9; divergence is a run
that made the metric worse by more than 10 %.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import asdict, dataclass, field

import numpy as np

STALL_RATIO = 0.9
DIVERGE_RATIO = 1.1


def _lines(i: np.ndarray, ly: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares lines a + b i through each row of ``ly`` (closed form)."""
    im = i.mean()
    di = i - im
    b = (ly - ly.mean(axis=-1, keepdims=True)) @ di / (di @ di)
    return ly.mean(axis=-1) - b * im, b


def fit(iterations, values, *, with_floor: bool | None = None) -> tuple[float, float, float]:
    """(A, r, floor) of y = floor + A r^i, least squares on log(y).

    Profile fit: for a trial floor f, log(y - f) = log A + i log r is a straight line; the floor is
    the value in [0, min y) that minimises the squared log error of the whole model, found by a
    grid search refined four times around the best trial (to about 1e-6 of min y), fast enough to
    bootstrap.

    Notes
    -----
    y = f + A r^i, fitted on log(y) (see the module notes; after Jones, Appl. Opt.
    16(1):218, 1977). The search is checked against scipy's bounded Brent minimiser.
    """
    i = np.asarray(iterations, float)
    y = np.asarray(values, float)
    if i.size < 2 or np.any(y <= 0):
        raise ValueError("convergence needs at least two positive values")
    ly = np.log(y)
    if with_floor is None:
        with_floor = i.size >= 4
    if not with_floor:
        a, b = _lines(i, ly)
        return float(np.exp(a)), float(np.exp(b)), 0.0

    def sse(f: np.ndarray) -> np.ndarray:
        a, b = _lines(i, np.log(y - f[:, None]))
        model = f[:, None] + np.exp(a[:, None] + b[:, None] * i)
        return np.sum((ly - np.log(model)) ** 2, axis=1)

    lo, hi = 0.0, float(y.min()) * 0.999
    best, best_sse = 0.0, float(sse(np.zeros(1))[0])
    for _ in range(5):
        trial = np.linspace(lo, hi, 33)
        err = sse(trial)
        k = int(np.argmin(err))
        if err[k] < best_sse:
            best, best_sse = float(trial[k]), float(err[k])
        step = trial[1] - trial[0]
        lo, hi = max(0.0, trial[k] - step), min(trial[-1], trial[k] + step)
    a, b = _lines(i, np.log(y - best))
    return float(np.exp(a)), float(np.exp(b)), best


def runs_to_reach(
    a: float, r: float, floor: float, tolerance: float, last_iteration: float
) -> float | None:
    """Further runs after ``last_iteration`` until the model is at or below the tolerance; None if never.

    Notes
    -----
    The first i with f + A r^i <= T: i = log((T - f) / A) / log r.
    """
    if r >= 1 or floor >= tolerance:
        return None
    if a <= 0:
        return 0.0
    i_star = math.log((tolerance - floor) / a) / math.log(r)
    return max(0.0, math.ceil(i_star - last_iteration - 1e-9))


@dataclass
class Convergence:
    """A part's convergence over its runs and the forecast of runs to the tolerance.

    Notes
    -----
    See the module notes (stall and divergence thresholds are common practice).
    """

    iterations: list[float]
    values: list[float]
    ratios: list[float]
    ratio: float | None
    floor: float | None
    tolerance: float | None
    runs_remaining: float | None
    runs_interval: tuple[float, float] | None
    status: str  # "in tolerance", "converging", "stalled", "diverging", "not converging", "too few runs"
    notes: list[str] = field(default_factory=list)

    def as_dict(self) -> dict:
        return asdict(self)


def analyse(
    iterations, values, *, tolerance: float | None = None, n_boot: int = 200, seed: int = 0
) -> Convergence:
    """Convergence of a part's metric over its runs, and the forecast of runs to the tolerance.

    Notes
    -----
    Residual bootstrap of the fit (Efron & Tibshirani, An Introduction to the Bootstrap,
    1993, §9.5), residuals inflated by sqrt(n / (n - p)) (see the module notes).
    """
    i = np.asarray(iterations, float)
    y = np.asarray(values, float)
    if i.shape != y.shape or i.ndim != 1:
        raise ValueError("iterations and values must be 1-D and of equal length")
    order = np.argsort(i)
    i, y = i[order], y[order]
    ratios = [float(b / a) for a, b in itertools.pairwise(y)] if y.size > 1 else []
    notes = []
    stalled = len(ratios) >= 2 and ratios[-1] > STALL_RATIO and ratios[-2] > STALL_RATIO
    diverging = bool(ratios) and ratios[-1] > DIVERGE_RATIO
    if y.size < 2:
        status = (
            "in tolerance"
            if tolerance is not None and y.size and y[-1] <= tolerance
            else "too few runs"
        )
        return Convergence(
            i.tolist(), y.tolist(), ratios, None, None, tolerance, None, None, status
        )
    a, r, f = fit(i, y)
    remaining = interval = None
    if tolerance is not None:
        if y[-1] <= tolerance:
            remaining, interval = 0.0, (0.0, 0.0)
        else:
            remaining = runs_to_reach(a, r, f, tolerance, i[-1])
            if y.size >= 3:  # an interval also when the point forecast says never
                rng = np.random.default_rng(seed)
                pred = np.log(f + a * r**i)
                n_par = 3 if y.size >= 4 else 2
                # residuals of a fit with p parameters on n points are too small by sqrt((n - p) / n)
                resid = (np.log(y) - pred) * np.sqrt(y.size / max(y.size - n_par, 1))
                sims = []
                for _ in range(n_boot):
                    yb = np.exp(pred + rng.choice(resid, resid.size, replace=True))
                    ab, rb, fb = fit(i, yb)
                    sims.append(runs_to_reach(ab, rb, fb, tolerance, i[-1]))
                runs = np.array([math.inf if s is None else s for s in sims], float)
                lo, hi = (
                    np.percentile(runs, 5, method="lower"),
                    np.percentile(runs, 95, method="higher"),
                )
                interval = (float(lo), float(hi))  # hi may be inf: "or never, at this rate"
                if math.isinf(hi):
                    notes.append(
                        "the upper end is open: some resampled fits never reach the tolerance"
                    )
    if tolerance is not None and y[-1] <= tolerance:
        status = "in tolerance"
    elif diverging:
        status = "diverging"
    elif stalled:
        status = "stalled"
    elif tolerance is not None and remaining is None:
        status = "not converging"
        notes.append(
            "fitted ratio >= 1" if r >= 1 else f"fitted floor {f:.3g} is at or above the tolerance"
        )
    else:
        status = "converging"
    return Convergence(
        i.tolist(), y.tolist(), ratios, r, f, tolerance, remaining, interval, status, notes
    )


def dominant_component(components: dict[str, float]) -> tuple[str, float]:
    """The component with the largest RMS contribution (e.g. power, astigmatism, a PSD band).

    Notes
    -----
    The largest RMS contribution; orthonormal Zernike coefficients and band RMS values are
    RMS contributions (ANSI Z80.28 / ISO 24157; Parseval).
    """
    if not components:
        raise ValueError("no components given")
    name = max(components, key=lambda k: abs(components[k]))
    return name, components[name]
