"""Preston's coefficient (Preston 1927) recovered from synthetic runs of known k_p."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from shopdb.spc.preston import fit_preston, preston_coefficient


def test_one_run_by_hand():
    """500 nm in 30 min at 10 kPa and 0.5 m/s: 5e-7 m / (1e4 Pa × 0.5 m/s × 1800 s)."""
    assert preston_coefficient(500, 10, 0.5, 1800) == pytest.approx(5e-7 / (1e4 * 0.5 * 1800))
    with pytest.raises(ValueError, match="positive pressure"):
        preston_coefficient(500, 0, 0.5, 1800)


def test_k_p_is_recovered_from_noisy_runs():
    """Runs with k_p = 1.2e-13 1/Pa (of the order glass polishing gives, from memory) and a
    15 nm depth measurement noise: the fit is within three of its standard errors, and it equals scipy's least squares
    through the origin (scipy.stats.linregress is not through the origin, so numpy.linalg.lstsq)."""
    rng = np.random.default_rng(7)
    p = rng.uniform(5, 20, 40)
    v = rng.uniform(0.2, 1.5, 40)
    t = rng.uniform(600, 5400, 40)
    k_true = 1.2e-13
    depth = k_true * p * 1e3 * v * t * 1e9 + rng.normal(0, 15, 40)
    k, se = fit_preston(depth, p, v, t)
    assert abs(k - k_true) < 3 * se and se < 0.01 * k_true
    w = (p * 1e3 * v * t)[:, None]
    (k_ref,), *_ = np.linalg.lstsq(w, depth * 1e-9, rcond=None)
    assert k == pytest.approx(k_ref, rel=1e-12)
    assert scipy.stats.pearsonr(w[:, 0], depth).statistic > 0.99
