"""Measurement uncertainty by the GUM: standard uncertainties of the input quantities, combined
by the law of propagation, expanded with a coverage factor.

Notes
-----
JCGM 100:2008 (GUM). For a measurand Y = f(X_1, ..., X_N) with uncorrelated inputs,
u_c^2(y) = sum_i c_i^2 u^2(x_i) with sensitivity coefficients c_i = df/dx_i (§5.1.2). A Type A
evaluation is statistical (§4.2: a standard deviation of repeated observations); a Type B one
uses other information (§4.3), e.g. a rectangular distribution of half-width a gives
u = a / sqrt(3) (§4.3.7). The expanded uncertainty is U = k u_c (§6.2); the effective degrees of
freedom follow Welch-Satterthwaite, nu_eff = u_c^4 / sum_i (c_i u_i)^4 / nu_i (§G.4.1), with
infinitely many for a Type B input whose limits are taken as certain.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

COVERAGE_FACTOR = 2.0  # k = 2: about 95 % coverage for a normal distribution (GUM §6.3.3)


@dataclass(frozen=True)
class Contribution:
    """One input of an uncertainty budget: its standard uncertainty ``u`` (in the measurand's
    unit after ``sensitivity``), how it was evaluated (``type`` "A" or "B"), its distribution,
    degrees of freedom (None: infinitely many) and the record it comes from.

    Notes
    -----
    JCGM 100:2008 §4.2 (Type A), §4.3 (Type B), §5.1.2 (sensitivity coefficients).
    """

    name: str
    u: float
    type: str  # "A" or "B"
    distribution: str = "normal"
    source: str = ""
    sensitivity: float = 1.0
    dof: float | None = None

    def __post_init__(self) -> None:
        if self.type not in ("A", "B"):
            raise ValueError(f"uncertainty contribution {self.name!r}: type must be 'A' or 'B'")
        if not (math.isfinite(self.u) and self.u >= 0):
            raise ValueError(
                f"uncertainty contribution {self.name!r}: standard uncertainty {self.u!r} "
                "must be a finite number >= 0"
            )

    @property
    def weighted(self) -> float:
        """|c_i| u(x_i): the contribution to the combined standard uncertainty."""
        return abs(self.sensitivity) * self.u

    def as_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> Contribution:
        return cls(**d)


def rectangular(name: str, half_width: float, *, source: str = "") -> Contribution:
    """A Type B input known only to lie within +- ``half_width``: u = a / sqrt(3).

    Notes
    -----
    JCGM 100:2008 §4.3.7 (rectangular distribution).

    Examples
    --------
    >>> round(rectangular("drift", 3.0).u, 4)
    1.7321
    """
    return Contribution(name, abs(half_width) / math.sqrt(3), "B", "rectangular", source)


@dataclass(frozen=True)
class Budget:
    """The combined and expanded uncertainty of one quantity, with its inputs.

    Notes
    -----
    JCGM 100:2008 §5.1.2 (combination), §6.2 (expansion), §G.4.1 (effective degrees of freedom).
    """

    contributions: tuple[Contribution, ...]
    u: float  # combined standard uncertainty
    k: float  # coverage factor
    dof: float | None  # effective degrees of freedom (None: infinitely many)

    @property
    def U(self) -> float:
        """Expanded uncertainty U = k u_c."""
        return self.k * self.u

    def as_dict(self) -> dict:
        return {
            "u": self.u,
            "k": self.k,
            "U": self.U,
            "dof": self.dof,
            "contributions": [c.as_dict() for c in self.contributions],
        }

    @classmethod
    def from_dict(cls, d: dict) -> Budget:
        return cls(
            tuple(Contribution.from_dict(c) for c in d.get("contributions", [])),
            float(d["u"]),
            float(d["k"]),
            d.get("dof"),
        )


def combine(contributions: list[Contribution], *, k: float = COVERAGE_FACTOR) -> Budget:
    """Combined standard uncertainty of uncorrelated inputs, expanded by ``k``.

    Notes
    -----
    JCGM 100:2008 Eq. (10): u_c^2 = sum (c_i u_i)^2; Welch-Satterthwaite Eq. (G.2b) for the
    effective degrees of freedom.

    Examples
    --------
    The end-gauge calibration of JCGM 100:2008 §H.1 (Table H.1): four inputs of 25, 9.7, 2.9 and
    16.6 nm with 18, 25.6, 50 and 2 degrees of freedom combine to u_c = 32 nm, nu_eff = 16.

    >>> b = combine([Contribution("ls", 25, "B", dof=18), Contribution("d", 9.7, "A", dof=25.6),
    ...              Contribution("da", 2.9, "B", dof=50), Contribution("dt", 16.6, "B", dof=2)])
    >>> round(b.u), int(b.dof)
    (32, 16)
    """
    if not k > 0:
        raise ValueError(f"coverage factor {k!r} must be > 0")
    u2 = sum(c.weighted**2 for c in contributions)
    u = math.sqrt(u2)
    denominator = sum(c.weighted**4 / c.dof for c in contributions if c.dof)
    dof = u2**2 / denominator if denominator > 0 else None
    return Budget(tuple(contributions), u, k, dof)
