"""Each special-cause rule on hand-built sequences: exactly which indices fire.

Rule definitions: Western Electric Statistical Quality Control Handbook (1956) and Nelson,
J. Quality Technology 16(4):237 (1984) (counts of test 2 from the source, the rest from memory,
shared/REFERENCES.md). Inputs are z-scores (value - centre) / sigma.
"""

from __future__ import annotations

import numpy as np
import pytest

from shopdb.spc import rules as R


def fires(fn, z):
    return np.flatnonzero(fn(np.asarray(z, float))).tolist()


def test_beyond_3sigma():
    assert fires(R.beyond_3sigma, [0, 3.1, -3.5, 2.9, 3.0]) == [1, 2]


def test_nine_same_side():
    z = [0.5] * 9 + [-0.1] + [0.2] * 8
    assert fires(R.nine_same_side, z) == [8]
    assert fires(R.nine_same_side, [0.5] * 11) == [8, 9, 10]


def test_six_trending():
    z = [0, 1, 2, 3, 4, 5, 4, 3, 2, 1, 0, -1]
    assert fires(R.six_trending, z) == [5, 10, 11]
    assert fires(R.six_trending, [0, 1, 2, 3, 4]) == []


def test_fourteen_alternating():
    z = [(-1) ** i * 0.5 for i in range(14)]
    assert fires(R.fourteen_alternating, z) == [13]
    assert fires(R.fourteen_alternating, z[:13]) == []
    assert fires(R.fourteen_alternating, [*z, z[-1] - 1]) == [13]  # the 15th goes the same way


def test_two_of_three_beyond_2sigma_same_side():
    assert fires(R.two_of_three_beyond_2sigma, [0, 2.5, 0, 2.2, 0]) == [3]
    assert fires(R.two_of_three_beyond_2sigma, [2.5, -2.5, 0.0]) == []  # opposite sides


def test_four_of_five_beyond_1sigma_same_side():
    assert fires(R.four_of_five_beyond_1sigma, [1.5, 1.2, 0, 1.1, 1.3, 0]) == [4]


def test_fifteen_within_1sigma():
    z = [0.5, -0.5] * 7 + [0.2]
    assert fires(R.fifteen_within_1sigma, z) == [14]
    assert fires(R.fifteen_within_1sigma, z[:14]) == []


def test_eight_outside_1sigma_both_sides():
    z = [1.5, -1.5] * 4
    assert fires(R.eight_outside_1sigma, z) == [7]
    assert fires(R.eight_outside_1sigma, [*z[:7], 0.5]) == []


def test_eight_same_side_western_electric():
    assert fires(R.eight_same_side, [-0.2] * 8) == [7]


@pytest.mark.parametrize(
    "fn",
    [
        R.beyond_3sigma,
        R.nine_same_side,
        R.six_trending,
        R.fourteen_alternating,
        R.two_of_three_beyond_2sigma,
        R.four_of_five_beyond_1sigma,
        R.fifteen_within_1sigma,
        R.eight_outside_1sigma,
        R.eight_same_side,
    ],
)
def test_empty_and_short(fn):
    assert fires(fn, []) == []
    assert fires(fn, [0.5]) == []


def test_evaluate_sets_and_words():
    z = [0.0] * 3 + [3.5]
    assert R.evaluate(z, "nelson")[3] == ["N1"]
    assert R.describe(["N2"]) == "9 points in a row on the same side of the centre line"
    with pytest.raises(ValueError, match="unknown rule set"):
        R.evaluate(z, "bogus")
