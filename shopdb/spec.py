"""ISO 10110-5 surface-form callouts: parse, and judge measured values against them.

Pure. The only caller that judges a measurement is :mod:`shopdb.services.verdict`, which decides
which values (whole aperture or worst test-field sub-aperture) are judged and adds the blockers.

Forms as drawings write them (ISO 10110-5:2015 §4 notation):

    3/A(B/C)          sagitta deviation A, irregularity B, rotationally symmetric irregularity C
    3/A(B)            C not specified
    3/-(B/C)          "-" (or the en dash) = no requirement for that field
    3/A(B/C) RMSt < D (also RMSi, RMSa; "<" or "<=")
    ...; λ = 632.8 nm test wavelength (required for fringe values)
    ...; Ø 20         test field: the tolerance applies to every sub-aperture of that diameter (mm)

Values are fringes of the stated wavelength (one fringe = lambda/2 of surface, ISO 14999-4) unless
written with "nm" (the 2015 form prefers nm: ``3/120 nm(30 nm)`` or ``... nm`` after the whole
callout applies nm to every field). The shop's own extra limits follow ``;`` as
``PVr < 80 nm``, ``slope < 2 urad`` or ``band2 < 1.5 nm`` (a PSD band by its 1-based index).
A malformed callout raises :class:`CalloutError` naming the character where parsing stopped.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field

from shopdb import quantities
from shopdb.spc import decision
from shopdb.spc.gum import Budget


class CalloutError(ValueError):
    def __init__(self, text: str, pos: int, problem: str) -> None:
        self.pos = pos
        super().__init__(
            f"callout {text!r}: {problem} at character {pos + 1} ({text[pos : pos + 8]!r})"
            if pos < len(text)
            else f"callout {text!r}: {problem} at the end"
        )


@dataclass(frozen=True)
class Limit:
    field: str
    value: float  # in the unit below
    unit: str  # "fr", "nm" or "urad"

    def nm(self, wavelength_nm: float | None) -> float:
        if self.unit == "fr":
            if wavelength_nm is None:
                raise ValueError(
                    f"{self.field} is given in fringes but no test wavelength is stated"
                )
            return self.value * wavelength_nm / 2
        return self.value


@dataclass(frozen=True)
class Callout:
    text: str
    limits: tuple[Limit, ...]
    wavelength_nm: float | None
    test_field_mm: float | None = None
    extras: tuple[Limit, ...] = field(default_factory=tuple)

    def limit_nm(self, name: str) -> float | None:
        for lim in (*self.limits, *self.extras):
            if lim.field == name:
                return lim.nm(self.wavelength_nm)
        return None


_NUM = r"(\d+(?:\.\d*)?|\.\d+)"
_DASH = "-–—"


def parse(text: str, *, default_wavelength_nm: float | None = None) -> Callout:
    """Parse a callout; ``default_wavelength_nm`` (the drawing's test wavelength) applies when none is stated."""
    s = text.strip()
    m = re.match(r"3\s*/\s*", s)
    if not m:
        raise CalloutError(s, 0, "a surface-form callout starts with '3/'")
    pos = m.end()
    head_end = s.find(";")
    head = s if head_end < 0 else s[:head_end]
    all_nm = bool(re.search(r"\)\s*nm\b", head))  # "3/120(30/10) nm": nm for every field

    def value(p: int, name: str) -> tuple[Limit | None, int]:
        while p < len(s) and s[p] == " ":
            p += 1
        if p < len(s) and s[p] in _DASH:
            return None, p + 1
        mm = re.compile(_NUM + r"\s*(nm)?").match(s, p)
        if not mm:
            raise CalloutError(s, p, f"expected a number or '-' for {name}")
        unit = "nm" if mm.group(2) or all_nm else "fr"
        return Limit(name, float(mm.group(1)), unit), mm.end()

    limits = []
    sag, pos = value(pos, "sag")
    if sag:
        limits.append(sag)
    while pos < len(s) and s[pos] == " ":
        pos += 1
    if pos >= len(s) or s[pos] != "(":
        raise CalloutError(s, pos, "expected '(' before the irregularity")
    irr, pos = value(pos + 1, "irregularity")
    if irr:
        limits.append(irr)
    if pos < len(s) and s[pos] == "/":
        rsi, pos = value(pos + 1, "rsi")
        if rsi:
            limits.append(rsi)
    while pos < len(s) and s[pos] == " ":
        pos += 1
    if pos >= len(s) or s[pos] != ")":
        raise CalloutError(s, pos, "expected ')' after the irregularity")
    pos += 1
    rest = s[pos:]
    wavelength = None
    test_field = None
    extras = []
    head_tail = rest.split(";")[0]
    mm = re.match(
        r"\s*(?:nm\s*)?(?:RMS([tia])\s*(<=|<|≤)\s*" + _NUM + r"\s*(nm)?)?\s*(nm)?\s*$", head_tail
    )
    if not mm:
        raise CalloutError(s, pos, "expected 'RMSt/RMSi/RMSa < value' or ';' after the callout")
    if mm.group(1):
        limits.append(
            Limit(
                "rms" + mm.group(1),
                float(mm.group(3)),
                "nm" if (mm.group(4) or mm.group(5) or all_nm) else "fr",
            )
        )
    offset = pos + len(head_tail)
    for part in rest.split(";")[1:]:
        start = s.find(part, offset)
        offset = start + len(part)
        p = part.strip()
        if not p:
            continue
        w = re.fullmatch(r"(?:λ|lambda)\s*=\s*" + _NUM + r"\s*nm", p)
        tf = re.fullmatch(r"(?:Ø|test field)\s*" + _NUM + r"\s*(?:mm)?", p)
        ex = re.fullmatch(r"(PVr|slope|band(\d+))\s*(<=|<|≤)\s*" + _NUM + r"\s*(nm|urad|µrad)?", p)
        if w:
            wavelength = float(w.group(1))
        elif tf:
            test_field = float(tf.group(1))
        elif ex:
            name = ex.group(1).lower()
            unit = "urad" if name == "slope" else "nm"
            extras.append(Limit(name, float(ex.group(4)), unit))
        else:
            raise CalloutError(s, start + len(part) - len(part.lstrip()), "unrecognised clause")
    if wavelength is None:
        wavelength = default_wavelength_nm
    if any(lim.unit == "fr" for lim in limits) and wavelength is None:
        raise CalloutError(s, len(s), "values in fringes need 'λ = ... nm'")
    return Callout(s, tuple(limits), wavelength, test_field, tuple(extras))


@dataclass(frozen=True)
class FieldOutcome:
    """One callout field judged: the measured value, its limit (nm, or µrad for slope), the
    margin ``limit - |measured|`` (negative when it is over), and — with an uncertainty budget —
    its expanded uncertainty, the ISO 14253-1 zone, ILAC-G8's name for the outcome of simple
    acceptance, the probability that the part conforms (JCGM 106) and the acceptance limit of the
    decision rule; ``passed`` is the rule's decision."""

    field: str
    measured: float | None
    limit: float
    passed: bool
    margin: float | None
    rule: str = "simple"
    budget: Budget | None = None
    zone: str | None = None
    outcome: str | None = None  # ILAC-G8: pass, conditional pass, conditional fail, fail
    acceptance_limit: float | None = None
    conformance_probability: float | None = None

    @property
    def quantity(self) -> quantities.Quantity:
        return quantities.for_field(self.field)

    @property
    def U(self) -> float | None:
        return None if self.budget is None else self.budget.U

    @property
    def conditional(self) -> bool:
        return self.zone == decision.UNCERTAINTY_RANGE

    def as_dict(self) -> dict:
        q = self.quantity
        return {
            "field": self.field,
            "label": q.label,
            "unit": q.unit,
            "measured": self.measured,
            "limit": self.limit,
            "passed": self.passed,
            "margin": self.margin,
            "rule": self.rule,
            "U": self.U,
            "k": None if self.budget is None else self.budget.k,
            "zone": self.zone,
            "outcome": self.outcome,
            "acceptance_limit": self.acceptance_limit,
            "conformance_probability": self.conformance_probability,
            "budget": None if self.budget is None else self.budget.as_dict(),
        }

    @classmethod
    def from_dict(cls, d: dict) -> FieldOutcome:
        """From :meth:`as_dict` (or the older form whose limit was ``limit_nm``)."""
        limit = d["limit"] if "limit" in d else d["limit_nm"]
        return cls(
            d["field"],
            d["measured"],
            float(limit),
            bool(d["passed"]),
            d["margin"],
            d.get("rule", "simple"),
            Budget.from_dict(d["budget"]) if d.get("budget") else None,
            d.get("zone"),
            d.get("outcome"),
            d.get("acceptance_limit"),
            d.get("conformance_probability"),
        )


def fields_of(callout: Callout) -> list[str]:
    """The callout fields a drawing limits, in the order it writes them."""
    return [lim.field for lim in (*callout.limits, *callout.extras)]


def values_from_result(callout: Callout, result: dict) -> dict[str, float | None]:
    """Each field's measured value from a result in its stored form (see
    :func:`shopdb.quantities.value_of`)."""
    return {f: quantities.value_of(quantities.for_field(f), result) for f in fields_of(callout)}


def evaluate(
    callout: Callout,
    values: Mapping[str, float | None],
    *,
    budgets: Mapping[str, Budget] | None = None,
    rule: decision.DecisionRule | None = None,
) -> list[FieldOutcome]:
    """Per field: measured value (``values`` maps a callout field to it), limit, margin, and the
    decision of ``rule`` (simple acceptance by default) given the field's uncertainty budget.

    Sag is judged by its magnitude (the callout's A bounds the deviation either way); a field
    without a finite value fails. Without a budget a field is judged as if U were 0.

    Examples
    --------
    >>> c = parse("3/1(0.25); λ = 632.8 nm")
    >>> [(f.field, f.passed, round(f.margin, 1)) for f in evaluate(c, {"sag": -100.0, "irregularity": 90.0})]
    [('sag', True, 216.4), ('irregularity', False, -10.9)]
    """
    rule = rule or decision.DecisionRule()
    budgets = budgets or {}
    out = []
    for lim in (*callout.limits, *callout.extras):
        limit = lim.nm(callout.wavelength_nm)
        measured = values.get(lim.field)
        budget = budgets.get(lim.field)
        if measured is None or not math.isfinite(measured):
            out.append(FieldOutcome(lim.field, None, limit, False, None, rule.text, budget))
            continue
        U = budget.U if budget is not None else 0.0
        accept = rule.acceptance_limit(limit, U)
        out.append(
            FieldOutcome(
                lim.field,
                float(measured),
                limit,
                abs(measured) <= accept,
                float(limit - abs(measured)),
                rule.text,
                budget,
                decision.zone(measured, limit, U) if budget is not None else None,
                decision.ilac_outcome(measured, limit, U) if budget is not None else None,
                accept,
                decision.conformance_probability(measured, limit, budget.u)
                if budget is not None
                else None,
            )
        )
    return out
