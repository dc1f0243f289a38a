"""Gage R&R of a measuring station: crossed study of parts x operators x trials.

Methods as the AIAG *Measurement Systems Analysis* reference manual (4th ed., 2010) gives them:

* average and range: EV = R-bar K1, AV = sqrt((X-diff K2)^2 - EV^2 / (n r)), PV = R_p K3,
  GRR = sqrt(EV^2 + AV^2), TV = sqrt(GRR^2 + PV^2), with K1 = 1 / d2(trials) and
  K2, K3 = 1 / d2*(appraisers or parts, one range), d2* = sqrt(E[R^2]) = sqrt(d2^2 + d3^2);
  d2 and d3 come from :mod:`shopdb.spc.constants`, computed from their definitions;
* ANOVA: two-way crossed with interaction; variance components from the mean squares
  (repeatability = MS_E, interaction = (MS_OP - MS_E) / r, operator = (MS_O - MS_OP) / (n r),
  part = (MS_P - MS_OP) / (k r)), negative estimates set to zero.

Percentages are of the total variation (standard deviations, as the manual's %EV, %AV, %GRR,
%PV); %GRR of tolerance = 100 x 6 GRR / tolerance; ndc = floor(1.41 PV / GRR).
Acceptance bands (common practice, the manual's guidance): %GRR under 10 % acceptable, 10-30 %
may be acceptable depending on the application, over 30 % not acceptable; ndc at least 5.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from shopdb.spc.constants import d2, d3


def d2_star_single(m: int) -> float:
    """d2* for one range of m values: sqrt(E[R^2]).

    Notes
    -----
    AIAG MSA manual (4th ed.), Appendix C: d2* for one range, sqrt(d2^2 + d3^2).
    """
    return math.sqrt(d2(m) ** 2 + d3(m) ** 2)


@dataclass(frozen=True)
class GageRR:
    """A gage R&R result: components, percentages, ndc and the verdict.

    Notes
    -----
    AIAG MSA manual (4th ed., 2010), chapter III-B (see the module notes).
    """

    method: str
    ev: float  # repeatability (equipment variation), as a standard deviation
    av: float  # reproducibility (appraiser variation)
    interaction: float  # operator x part (ANOVA only; 0 for average and range)
    grr: float
    pv: float
    tv: float
    pct_ev: float
    pct_av: float
    pct_grr: float
    pct_pv: float
    pct_grr_tolerance: float | None
    ndc: int
    verdict: str
    anova: dict = field(default_factory=dict)

    def as_dict(self) -> dict:
        return dict(self.__dict__)


def table_to_cube(
    parts: list, operators: list, trials: list, values: list
) -> tuple[np.ndarray, list, list]:
    """Long-form rows -> array [operator, part, trial]; the study must be complete and balanced.

    Notes
    -----
    The crossed design of the AIAG MSA manual (4th ed.): every operator measures every part
    the same number of times.
    """
    ops = sorted(set(operators), key=str)
    pts = sorted(set(parts), key=str)
    cells: dict[tuple, list[float]] = {}
    for p, o, _t, v in zip(parts, operators, trials, values, strict=True):
        v = float(v)
        if not math.isfinite(v):
            raise ValueError(f"value {v} for part {p}, operator {o} is not a finite number")
        cells.setdefault((o, p), []).append(v)
    counts = {len(cells.get((o, p), [])) for o in ops for p in pts}
    if len(counts) != 1 or 0 in counts:
        raise ValueError(
            "the study is not balanced: every operator must measure every part the same number "
            f"of times (found {sorted(counts)} trials per cell)"
        )
    r = counts.pop()
    if len(ops) < 2 or len(pts) < 2 or r < 2:
        raise ValueError(
            f"a crossed study needs at least 2 operators, 2 parts and 2 trials "
            f"(got {len(ops)}, {len(pts)}, {r})"
        )
    cube = np.array([[cells[(o, p)] for p in pts] for o in ops])
    return cube, ops, pts


def parse_study(text: str) -> np.ndarray:
    """CSV text with columns part, operator, trial, value -> array [operator, part, trial].

    Notes
    -----
    Columns as the AIAG MSA manual's data sheet lists them (part, appraiser, trial, value).
    """
    import csv

    rows = list(csv.DictReader(text.splitlines()))
    need = {"part", "operator", "trial", "value"}
    if not rows or not need <= set(rows[0]):
        raise ValueError(f"needs a header with columns {', '.join(sorted(need))}")
    values = []
    for i, row in enumerate(rows, start=2):
        try:
            v = float(row["value"])
        except (TypeError, ValueError):
            raise ValueError(f"row {i}: value {row['value']!r} is not a number") from None
        if not math.isfinite(v):
            raise ValueError(f"row {i}: value {row['value']!r} is not finite")
        values.append(v)
    cube, _, _ = table_to_cube(
        [r["part"] for r in rows], [r["operator"] for r in rows], [r["trial"] for r in rows], values
    )
    return cube


def _finish(method, ev, av, inter, pv, tolerance, anova=None) -> GageRR:
    grr = math.sqrt(ev**2 + av**2 + inter**2)
    tv = math.sqrt(grr**2 + pv**2)

    def pct(x):
        return 100 * x / tv if tv > 0 else math.nan

    ndc = math.floor(1.41 * pv / grr) if grr > 0 else 0
    p_grr = pct(grr)
    band = (
        "acceptable"
        if p_grr < 10
        else "may be acceptable depending on the application"
        if p_grr <= 30
        else "not acceptable"
    )
    if ndc < 5:
        band += f"; ndc {ndc} is below 5"
    return GageRR(
        method=method,
        ev=ev,
        av=av,
        interaction=inter,
        grr=grr,
        pv=pv,
        tv=tv,
        pct_ev=pct(ev),
        pct_av=pct(av),
        pct_grr=p_grr,
        pct_pv=pct(pv),
        pct_grr_tolerance=100 * 6 * grr / tolerance if tolerance else None,
        ndc=ndc,
        verdict=band,
        anova=anova or {},
    )


def _check(cube: np.ndarray, tolerance: float | None) -> tuple[int, int, int]:
    if cube.ndim != 3 or min(cube.shape) < 2:
        raise ValueError(
            f"study array must be operators x parts x trials, each >= 2; got {cube.shape}"
        )
    if tolerance is not None and not (math.isfinite(tolerance) and tolerance > 0):
        raise ValueError(f"tolerance must be a positive number, got {tolerance}")
    return cube.shape


def average_and_range(cube: np.ndarray, *, tolerance: float | None = None) -> GageRR:
    """Average-and-range method on ``cube[operator, part, trial]``.

    Notes
    -----
    AIAG MSA manual (4th ed., 2010), III-B, average and range method.
    """
    k, n, r = _check(cube, tolerance)
    r_bar = float(np.mean(cube.max(axis=2) - cube.min(axis=2)))
    ev = r_bar / d2(r)
    op_means = cube.mean(axis=(1, 2))
    x_diff = float(op_means.max() - op_means.min())
    av = math.sqrt(max((x_diff / d2_star_single(k)) ** 2 - ev**2 / (n * r), 0.0))
    part_means = cube.mean(axis=(0, 2))
    pv = float(part_means.max() - part_means.min()) / d2_star_single(n)
    return _finish("average and range", ev, av, 0.0, pv, tolerance)


def anova_components(cube: np.ndarray) -> dict:
    """Two-way crossed ANOVA table with interaction: sources part, operator, part x operator, error.

    Notes
    -----
    Two-way crossed ANOVA with interaction (Montgomery, Design and Analysis of Experiments,
    §13.2; AIAG MSA manual III-B).
    """
    k, n, r = cube.shape
    grand = cube.mean()
    ss_p = k * r * float(((cube.mean(axis=(0, 2)) - grand) ** 2).sum())
    ss_o = n * r * float(((cube.mean(axis=(1, 2)) - grand) ** 2).sum())
    cell = cube.mean(axis=2)
    ss_e = float(((cube - cell[:, :, None]) ** 2).sum())
    ss_t = float(((cube - grand) ** 2).sum())
    ss_op = ss_t - ss_p - ss_o - ss_e
    df = {
        "part": n - 1,
        "operator": k - 1,
        "interaction": (n - 1) * (k - 1),
        "error": n * k * (r - 1),
    }
    ss = {"part": ss_p, "operator": ss_o, "interaction": ss_op, "error": ss_e}
    ms = {s: ss[s] / df[s] for s in ss}
    f = {
        "part": ms["part"] / ms["interaction"],
        "operator": ms["operator"] / ms["interaction"],
        "interaction": ms["interaction"] / ms["error"],
    }
    p = {
        "part": float(stats.f.sf(f["part"], df["part"], df["interaction"])),
        "operator": float(stats.f.sf(f["operator"], df["operator"], df["interaction"])),
        "interaction": float(stats.f.sf(f["interaction"], df["interaction"], df["error"])),
    }
    return {"ss": ss, "df": df, "ms": ms, "f": f, "p": p}


def anova(cube: np.ndarray, *, tolerance: float | None = None) -> GageRR:
    """ANOVA method on ``cube[operator, part, trial]``.

    Notes
    -----
    AIAG MSA manual (4th ed., 2010), III-B, ANOVA method.
    """
    k, n, r = _check(cube, tolerance)
    a = anova_components(cube)
    ms = a["ms"]
    var_e = ms["error"]
    var_op = max((ms["interaction"] - ms["error"]) / r, 0.0)
    var_o = max((ms["operator"] - ms["interaction"]) / (n * r), 0.0)
    var_p = max((ms["part"] - ms["interaction"]) / (k * r), 0.0)
    return _finish(
        "ANOVA",
        math.sqrt(var_e),
        math.sqrt(var_o),
        math.sqrt(var_op),
        math.sqrt(var_p),
        tolerance,
        anova=a,
    )
