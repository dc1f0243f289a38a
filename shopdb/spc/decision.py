"""Decision rules: whether a measured value with expanded uncertainty U meets an upper limit.

Notes
-----
ISO 14253-1:2017 divides the axis at an upper specification limit L into the zone where
conformance is proven (the value and its uncertainty interval below L: y <= L - U), the zone
where non-conformance is proven (y > L + U), and the uncertainty range between. ILAC-G8:09/2019
names the four outcomes of simple acceptance with U reported: pass (y <= L - U), conditional
pass (L - U < y <= L), conditional fail (L < y <= L + U) and fail (y > L + U).

The rules a drawing can state (shopdb's names):

* ``simple`` — simple acceptance (ILAC-G8 §4.2.1): accept when y <= L; U is stated beside it;
* ``strict`` — guarded acceptance with guard band w = U (ILAC-G8 §4.2.2, ISO 14253-1 §5.2): accept
  only when y <= L - w, i.e. conformance proven; ``strict:1.5`` takes w = 1.5 U;
* ``lenient`` — guarded rejection with w = U (ILAC-G8 §4.2.3): reject only when y > L + w,
  non-conformance proven; ``lenient:1.5`` likewise.

All limits here bound a magnitude (|y| <= L: the sagitta either way, PV and RMS from above).
The probability that an item conforms given the measurement follows JCGM 106:2012 §9 (specific
risk) with a normal model of the measurand centred on y with standard deviation u:
p_c = P(-L <= Y <= L) for a magnitude limit; the risk of a false acceptance is 1 - p_c of an
accepted item.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

RULES = ("simple", "strict", "lenient")
CONFORMANCE_PROVEN = "conformance proven"
NONCONFORMANCE_PROVEN = "non-conformance proven"
UNCERTAINTY_RANGE = "inside the uncertainty range"


@dataclass(frozen=True)
class DecisionRule:
    """A decision rule and its guard-band multiple (``strict:1.5`` -> ("strict", 1.5)).

    Notes
    -----
    ILAC-G8:09/2019 §4.2; ISO 14253-1:2017 §5 (see the module notes).
    """

    kind: str = "simple"
    multiple: float = 1.0

    def __post_init__(self) -> None:
        if self.kind not in RULES:
            raise ValueError(
                f"decision rule {self.kind!r} is not one of {', '.join(RULES)} "
                "(strict and lenient take a guard-band multiple, e.g. strict:1.5)"
            )
        if not (math.isfinite(self.multiple) and 0 < self.multiple <= 10):
            raise ValueError(f"guard-band multiple {self.multiple!r} must be in (0, 10]")

    @classmethod
    def parse(cls, text: str) -> DecisionRule:
        """``simple``, ``strict``, ``strict:1.5``, ``lenient``, ``lenient:2``.

        Examples
        --------
        >>> DecisionRule.parse("strict:1.5")
        DecisionRule(kind='strict', multiple=1.5)
        """
        kind, _, mult = text.strip().partition(":")
        try:
            multiple = float(mult) if mult else 1.0
        except ValueError:
            raise ValueError(
                f"decision rule {text!r}: the multiple {mult!r} is not a number"
            ) from None
        if kind == "simple" and mult:
            raise ValueError("decision rule 'simple' takes no guard-band multiple")
        return cls(kind, multiple)

    @property
    def text(self) -> str:
        return (
            self.kind
            if self.kind == "simple" or self.multiple == 1
            else f"{self.kind}:{self.multiple:g}"
        )

    def describe(self) -> str:
        """The rule in words, as a certificate states it."""
        w = "U" if self.multiple == 1 else f"{self.multiple:g} U"
        return {
            "simple": "simple acceptance: a value at or under its limit passes; U is stated "
            "(ILAC-G8:09/2019 §4.2.1)",
            "strict": f"guarded acceptance: a value passes only at or under its limit minus {w}, "
            "where conformance is proven (ILAC-G8:09/2019 §4.2.2, ISO 14253-1:2017)",
            "lenient": f"guarded rejection: a value fails only over its limit plus {w}, where "
            "non-conformance is proven (ILAC-G8:09/2019 §4.2.3, ISO 14253-1:2017)",
        }[self.kind]

    def acceptance_limit(self, limit: float, U: float) -> float:
        """The value up to which a magnitude is accepted under this rule."""
        w = self.multiple * U
        return {"simple": limit, "strict": limit - w, "lenient": limit + w}[self.kind]


def zone(measured: float, limit: float, U: float) -> str:
    """ISO 14253-1 zone of a magnitude |measured| against an upper limit with expanded
    uncertainty U: conformance proven (<= L - U), non-conformance proven (> L + U), or inside
    the uncertainty range.

    Notes
    -----
    ISO 14253-1:2017 §5 (see the module notes).

    Examples
    --------
    >>> zone(30.1, 31.6, 2.5)
    'inside the uncertainty range'
    """
    y = abs(measured)
    if y <= limit - U:
        return CONFORMANCE_PROVEN
    if y > limit + U:
        return NONCONFORMANCE_PROVEN
    return UNCERTAINTY_RANGE


def ilac_outcome(measured: float, limit: float, U: float) -> str:
    """ILAC-G8's name for the outcome of simple acceptance: pass, conditional pass, conditional
    fail or fail.

    Notes
    -----
    ILAC-G8:09/2019 §4.2.1 and its Figure 4 (see the module notes).
    """
    y = abs(measured)
    if y <= limit - U:
        return "pass"
    if y <= limit:
        return "conditional pass"
    if y <= limit + U:
        return "conditional fail"
    return "fail"


def conformance_probability(measured: float, limit: float, u: float) -> float:
    """Probability that the true magnitude is within the limit, given the measured value and
    its standard uncertainty u (normal model, flat prior).

    Notes
    -----
    JCGM 106:2012 §9.3 (specific conformance probability, normal PDF):
    p_c = Phi((L - y) / u) - Phi((-L - y) / u) for the tolerance interval [-L, L].

    Examples
    --------
    >>> round(conformance_probability(30.1, 31.6, 1.25), 4)
    0.8849
    """
    if u <= 0:
        return 1.0 if abs(measured) <= limit else 0.0

    def phi(x: float) -> float:
        return 0.5 * math.erfc(-x / math.sqrt(2))

    return phi((limit - measured) / u) - phi((-limit - measured) / u)
