"""Drift of reference optics and stations.

Notes
-----
A reference's calibrated value (a Zernike term, PV or RMS) against time is fitted by ordinary
least squares; the slope is the drift rate (reported per 30.44-day month), with the t-based
confidence band of the mean line (Montgomery, Peck & Vining, Linear Regression Analysis §2.4).
The deviation predicted since the last calibration is the line's change over that time; the
recalibration due date is when its magnitude reaches ``threshold``.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from datetime import datetime, timedelta

import numpy as np
from scipy import special

DAYS_PER_MONTH = 30.436875


@dataclass
class Drift:
    """The drift of a reference optic's calibrated quantity.

    Notes
    -----
    Montgomery, Peck & Vining, Introduction to Linear Regression Analysis §2.4 (confidence
    band of the mean line).
    """

    n: int
    rate_per_month: float
    rate_ci: tuple[float, float]
    intercept_at_last: float
    predicted_now: float
    predicted_change_since_last: float
    threshold: float | None
    exceeds_at: datetime | None
    band_times: list[datetime]
    band_low: list[float]
    band_high: list[float]
    fit_line: list[float]

    def as_dict(self) -> dict:
        return asdict(self)


def drift(
    times: list[datetime],
    values,
    *,
    now: datetime,
    threshold: float | None = None,
    confidence: float = 0.95,
) -> Drift:
    """Drift rate (per month) of a calibrated quantity, its band and the due date.

    Notes
    -----
    Ordinary least squares of value on time; the slope's t-based interval and the mean line's
    band (Montgomery, Peck & Vining §2.4).
    """
    if len(times) != len(values):
        raise ValueError("times and values differ in length")
    if len(times) < 3:
        raise ValueError(f"drift needs at least 3 calibrations, got {len(times)}")
    t0 = min(times)
    d = np.array([(t - t0).total_seconds() / 86400 for t in times])
    y = np.asarray(values, float)
    n = d.size
    sxx = np.sum((d - d.mean()) ** 2)
    slope = float(np.sum((d - d.mean()) * (y - y.mean())) / sxx)
    intercept = float(y.mean() - slope * d.mean())
    s = np.sqrt(np.sum((y - (intercept + slope * d)) ** 2) / (n - 2))
    stderr = s / np.sqrt(sxx)  # standard error of the slope
    tq = special.stdtrit(n - 2, 0.5 + confidence / 2)  # Student t quantile
    rate_ci = (
        float((slope - tq * stderr) * DAYS_PER_MONTH),
        float((slope + tq * stderr) * DAYS_PER_MONTH),
    )
    grid = np.linspace(d.min(), max(d.max(), (now - t0).total_seconds() / 86400), 50)
    half = tq * s * np.sqrt(1 / n + (grid - d.mean()) ** 2 / sxx)
    line = intercept + slope * grid
    last_d = d.max()
    now_d = (now - t0).total_seconds() / 86400
    at_last = intercept + slope * last_d
    pred_now = intercept + slope * now_d
    exceeds = None
    if threshold is not None and slope != 0:
        days = abs(threshold / slope)
        exceeds = t0 + timedelta(days=float(last_d + days))
    return Drift(
        n,
        float(slope * DAYS_PER_MONTH),
        rate_ci,
        float(at_last),
        float(pred_now),
        float(pred_now - at_last),
        threshold,
        exceeds,
        [t0 + timedelta(days=float(g)) for g in grid],
        (line - half).tolist(),
        (line + half).tolist(),
        line.tolist(),
    )
