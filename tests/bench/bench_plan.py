"""Dwell plan speed (run by hand; the target is <= 5 s on a 2-core machine):

    python tests/bench/bench_plan.py [--n 1024] [--spacing 1.0]

A 100 mm part on an n×n map (form, astigmatism and a 19 mm ripple), a Gaussian TIF 20 mm across
(sigma 2.5 mm, cut at ±4 sigma), the machine grid at ``--spacing`` mm: times plan_dwell (the
FISTA solve on the machine grid and the prediction on the map's pixels) and reports the residual.
"""

from __future__ import annotations

import argparse
import json
import statistics
import time

import numpy as np

from shopdb.surface import dwell


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=1024)
    ap.add_argument("--spacing", type=float, default=1.0)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    n, diameter = args.n, 100.0
    dx = diameter / n
    y, x = (np.mgrid[:n, :n] - (n - 1) / 2) * dx
    r = np.hypot(x, y) / (diameter / 2)
    h = 30 * (2 * r**2 - 1) + 10 * r**2 * np.cos(2 * np.arctan2(y, x)) + 3 * np.sin(x / 3)
    h = np.where(r <= 1, h, np.nan)
    tif = dwell.GaussianTIF(sigma_mm=2.5, peak_nm_per_s=2.0)
    times = []
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        plan = dwell.plan_dwell(h, dx, tif, spacing_mm=args.spacing)
        times.append(time.perf_counter() - t0)
    print(
        json.dumps(
            {
                "map": f"{n}x{n}",
                "tif_diameter_mm": tif.diameter_mm,
                "spacing_mm": plan.spacing_mm,
                "grid": list(plan.dwell_s.shape),
                "iterations": plan.iterations,
                "median_s": round(statistics.median(times), 3),
                "rms_before_nm": round(float(np.nanstd(h)), 3),
                "rms_predicted_nm": round(float(np.nanstd(plan.predicted_nm)), 3),
                "total_dwell_min": round(plan.total_time_s / 60, 1),
            }
        )
    )


if __name__ == "__main__":
    main()
