"""Special-cause rules on a control chart, one function each, returning per-point flags.

A rule fires at the point that completes its pattern (the last point of the run), as is common
practice in charting software. Inputs: ``z`` = (value - centre) / sigma per point (NaN where a
point has no limits).

Sources: Western Electric, Statistical Quality Control Handbook (1956), rules 1-4; L. S. Nelson,
"The Shewhart control chart — tests for special causes", J. Quality Technology 16(4):237 (1984),
tests 1-8. Nelson's test 3 is read as six points in a row steadily increasing (five increases);
test 4 as fourteen points alternating up and down (thirteen alternating differences).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np


def _windows(cond: np.ndarray, length: int, need: int | None = None) -> np.ndarray:
    """Fires at i when at least ``need`` (default all) of cond[i-length+1 .. i] are true."""
    n = cond.size
    out = np.zeros(n, bool)
    if n < length:
        return out
    need = length if need is None else need
    c = np.concatenate([[0], np.cumsum(cond.astype(int))])
    counts = c[length:] - c[:-length]
    out[length - 1 :] = counts >= need
    return out


def _side_run(z: np.ndarray, length: int, need: int, threshold: float) -> np.ndarray:
    """``need`` of ``length`` consecutive points beyond +threshold, or beyond -threshold; the
    completing point must itself be beyond (so the flag sits on a point that contributes)."""
    up = np.nan_to_num(z, nan=0.0) > threshold
    down = np.nan_to_num(z, nan=0.0) < -threshold
    return (_windows(up, length, need) & up) | (_windows(down, length, need) & down)


def beyond_3sigma(z):
    """WE 1 / Nelson 1: one point beyond 3 sigma.

    Notes
    -----
    Western Electric rule 1; Nelson test 1 (J. Quality Technology 16(4):237, 1984).
    """
    return np.abs(np.nan_to_num(np.asarray(z, float), nan=0.0)) > 3


def two_of_three_beyond_2sigma(z):
    """WE 2 / Nelson 5: two of three points in a row beyond 2 sigma on the same side.

    Notes
    -----
    Western Electric rule 2; Nelson test 5.
    """
    return _side_run(np.asarray(z, float), 3, 2, 2.0)


def four_of_five_beyond_1sigma(z):
    """WE 3 / Nelson 6: four of five points in a row beyond 1 sigma on the same side.

    Notes
    -----
    Western Electric rule 3; Nelson test 6.
    """
    return _side_run(np.asarray(z, float), 5, 4, 1.0)


def eight_same_side(z):
    """WE 4: eight points in a row on the same side of the centre line.

    Notes
    -----
    Western Electric rule 4 (eight in a row on one side of the centre).
    """
    return _side_run(np.asarray(z, float), 8, 8, 0.0)


def nine_same_side(z):
    """Nelson 2: nine points in a row on the same side of the centre line.

    Notes
    -----
    Nelson test 2 (nine in a row on one side).
    """
    return _side_run(np.asarray(z, float), 9, 9, 0.0)


def six_trending(z):
    """Nelson 3: six points in a row steadily increasing or decreasing.

    Notes
    -----
    Nelson test 3 (six points steadily increasing or decreasing).
    """
    z = np.asarray(z, float)
    d = np.diff(z)
    out = np.zeros(z.size, bool)
    out[1:] = _windows(d > 0, 5) | _windows(d < 0, 5)
    return out


def fourteen_alternating(z):
    """Nelson 4: fourteen points in a row alternating up and down.

    Notes
    -----
    Nelson test 4 (fourteen points alternating up and down).
    """
    z = np.asarray(z, float)
    d = np.sign(np.diff(z))
    alt = np.zeros(d.size, bool)
    alt[1:] = (d[1:] * d[:-1]) < 0  # a change of direction at each point
    out = np.zeros(z.size, bool)
    out[2:] = _windows(alt[1:], 12)  # 13 differences, 12 sign changes
    return out


def fifteen_within_1sigma(z):
    """Nelson 7: fifteen points in a row within 1 sigma of the centre line (both sides).

    Notes
    -----
    Nelson test 7 (fifteen in a row within 1 sigma).
    """
    z = np.asarray(z, float)
    return _windows(np.abs(np.nan_to_num(z, nan=9.0)) < 1, 15)


def eight_outside_1sigma(z):
    """Nelson 8: eight points in a row none within 1 sigma, on both sides.

    Notes
    -----
    Nelson test 8 (eight in a row beyond 1 sigma, on either side).
    """
    z = np.asarray(z, float)
    return _windows(np.abs(np.nan_to_num(z, nan=0.0)) > 1, 8)


@dataclass(frozen=True)
class Rule:
    """One special-cause rule: its code, test and wording.

    Notes
    -----
    Western Electric Statistical Quality Control Handbook (1956); Nelson 1984.
    """

    code: str
    test: Callable[[np.ndarray], np.ndarray]
    words: str  # what a firing means, in plain words


RULES: dict[str, Rule] = {
    r.code: r
    for r in (
        Rule("N1", beyond_3sigma, "a point beyond the 3-sigma control limit"),
        Rule("N2", nine_same_side, "9 points in a row on the same side of the centre line"),
        Rule("N3", six_trending, "6 points in a row steadily increasing or decreasing"),
        Rule("N4", fourteen_alternating, "14 points in a row alternating up and down"),
        Rule(
            "N5",
            two_of_three_beyond_2sigma,
            "2 of 3 points in a row beyond 2 sigma on the same side",
        ),
        Rule(
            "N6",
            four_of_five_beyond_1sigma,
            "4 of 5 points in a row beyond 1 sigma on the same side",
        ),
        Rule("N7", fifteen_within_1sigma, "15 points in a row within 1 sigma of the centre line"),
        Rule(
            "N8",
            eight_outside_1sigma,
            "8 points in a row more than 1 sigma from the centre line, either side",
        ),
        Rule("WE4", eight_same_side, "8 points in a row on the same side of the centre line"),
        # decided by the chart itself (EWMA and CUSUM statistics against their own limits)
        Rule("EWMA", beyond_3sigma, "the EWMA statistic beyond its control limit"),
        Rule("CUSUM+", beyond_3sigma, "the upper CUSUM beyond its decision interval: a shift up"),
        Rule("CUSUM-", beyond_3sigma, "the lower CUSUM beyond its decision interval: a shift down"),
    )
}
RULE_SETS = {
    "nelson": ("N1", "N2", "N3", "N4", "N5", "N6", "N7", "N8"),
    "western-electric": ("N1", "N5", "N6", "WE4"),
    "limits": ("N1",),
}


def evaluate(z: np.ndarray, rule_set: str | tuple[str, ...] = "nelson") -> list[list[str]]:
    """For each point, the codes of the rules that fire there.

    Notes
    -----
    Rule sets: Nelson's eight tests (1984), Western Electric's four rules (1956), or the
    limits alone.
    """
    codes = RULE_SETS.get(rule_set, rule_set) if isinstance(rule_set, str) else rule_set
    unknown = [c for c in codes if c not in RULES]
    if unknown or (isinstance(rule_set, str) and rule_set not in RULE_SETS):
        raise ValueError(f"unknown rule set or rules {rule_set!r}; sets: {', '.join(RULE_SETS)}")
    z = np.asarray(z, float)
    fired: list[list[str]] = [[] for _ in range(z.size)]
    for code in codes:
        for i in np.flatnonzero(RULES[code].test(z)):
            fired[i].append(code)
    return fired


def describe(codes: list[str]) -> str:
    """The rules that fired at a point, in plain words.

    Notes
    -----
    The rules' wording after Nelson (1984) and the Western Electric handbook (1956).
    """
    return "; ".join(RULES[c].words for c in codes)
