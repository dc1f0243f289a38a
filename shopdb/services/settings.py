"""Shop-wide settings a role may change, with their defaults; every change is audited.

``decision_rule``
    The decision rule a new drawing takes when its revision names none (``simple``, ``strict``
    or ``lenient``, optionally with a guard-band multiple: :mod:`shopdb.spc.decision`). Set by QA
    (or an admin): it is the shop's quality policy, which the customer's agreement may override
    per drawing.
``reference_u_nm``
    The standard uncertainty (nm, RMS over the aperture) assumed for a reference calibration that
    states none (an uncertainty of 0 and no per-term record). Set by metrology (or an admin).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from sqlmodel import Session

from shopdb.errors import ShopdbError
from shopdb.models import ShopSetting, User, utcnow
from shopdb.services.audit import record_event
from shopdb.services.users import require
from shopdb.spc.decision import DecisionRule


def _rule(value: Any) -> str:
    try:
        return DecisionRule.parse(str(value)).text
    except ValueError as exc:
        raise ShopdbError(str(exc)) from None


def _u(value: Any) -> float:
    try:
        u = float(value)
    except (TypeError, ValueError):
        raise ShopdbError(f"reference_u_nm {value!r} is not a number of nm") from None
    if not (math.isfinite(u) and 0 <= u <= 100):
        raise ShopdbError(f"reference_u_nm {u!r} must be in [0, 100] nm")
    return u


@dataclass(frozen=True)
class Setting:
    key: str
    default: Any
    action: str  # the permission it takes to change it (services.users.PERMISSIONS)
    check: Callable[[Any], Any]
    meaning: str


SETTINGS = {
    s.key: s
    for s in (
        Setting(
            "decision_rule",
            "simple",
            "quality_policy",
            _rule,
            "decision rule of a drawing that names none",
        ),
        Setting(
            "reference_u_nm",
            0.5,
            "calibrate",
            _u,
            "standard uncertainty (nm) of a reference calibration that states none",
        ),
    )
}


def get(session: Session, key: str) -> Any:
    """The setting's value (its default until someone sets it)."""
    if key not in SETTINGS:
        raise ShopdbError(f"unknown setting {key!r}: one of {', '.join(SETTINGS)}")
    row = session.get(ShopSetting, key)
    return SETTINGS[key].default if row is None else row.value["value"]


def all_settings(session: Session) -> list[dict]:
    return [
        {"key": k, "value": get(session, k), "default": s.default, "meaning": s.meaning}
        for k, s in SETTINGS.items()
    ]


def set_value(*, session: Session, actor: User, key: str, value: Any, reason: str = "") -> Any:
    """Change a setting (audited, with the value before and after)."""
    if key not in SETTINGS:
        raise ShopdbError(f"unknown setting {key!r}: one of {', '.join(SETTINGS)}")
    spec = SETTINGS[key]
    require(actor, spec.action)
    checked = spec.check(value)
    before = get(session, key)
    row = session.get(ShopSetting, key)
    if row is None:
        row = ShopSetting(key=key, value={"value": checked}, updated_by=actor.username)
    else:
        row.value = {"value": checked}
        row.updated_at = utcnow()
        row.updated_by = actor.username
    session.add(row)
    session.flush()
    record_event(
        session=session,
        actor=actor.username,
        action="update",
        table_name="shop_setting",
        record_id=key,
        before={"value": before},
        after={"value": checked},
        reason=reason,
    )
    return checked
