"""A station's ingest profile: what its files leave unsaid, how its maps are turned to the part's
datum, which reference and check standard it uses, and how its maps are analysed.

The profile is stored as JSON on the station; :meth:`StationProfile.from_dict` is the one place
that reads it (unknown keys and bad values are refused with a sentence naming them).
Pure: no database.
"""

from __future__ import annotations

import math
import re
from dataclasses import asdict, dataclass, field, fields
from typing import Any

from shopdb.surface.maps import KINDS, UNITS
from shopdb.surface.orient import FLIPS, ROTATIONS
from shopdb.surface.settings import AnalysisSettings

CHECK_MAX_AGE_DAYS = 7


class ProfileError(ValueError):
    """A station profile key or value that cannot be used."""


@dataclass(frozen=True)
class StationProfile:
    """Ingest defaults of one measurement station.

    Attributes
    ----------
    format : reader name (``x3p``, ``npy``, ...) for files whose suffix does not say it.
    dx_mm : pixel pitch in mm, for files that do not carry it.
    units : height units of files that do not carry them (nm, um, waves, fringes).
    kind : ``surface``, or ``wavefront`` for a reflected wavefront (halved at ingest).
    flip, rotate_deg : how the station's maps are turned to the part's datum: flip (``lr``
        reverses columns, ``ud`` reverses rows) then rotate counter-clockwise by 0/90/180/270°.
    reference : name of the reference optic whose calibration must be valid for a measurement.
    reference_flip, reference_rotate_deg : how the reference appears in the station's oriented
        maps (its calibration is in its own coordinates).
    subtract_reference : subtract the reference calibration from every map at ingest.
    settings : analysis settings (see :class:`shopdb.surface.settings.AnalysisSettings`).
    serial_pattern : regular expression with a group ``serial`` (watch folders).
    check_standard : serial of the artefact measured routinely to chart the station's state.
    check_max_age_days : how old the latest check may be for a release (default 7).
    """

    format: str | None = None
    dx_mm: float | None = None
    units: str | None = None
    kind: str | None = None
    flip: str = "none"
    rotate_deg: int = 0
    reference: str | None = None
    reference_flip: str = "none"
    reference_rotate_deg: int = 0
    subtract_reference: bool = False
    settings: dict = field(default_factory=dict)
    serial_pattern: str | None = None
    check_standard: str | None = None
    check_max_age_days: float = CHECK_MAX_AGE_DAYS

    def __post_init__(self) -> None:
        for key in ("flip", "reference_flip"):
            if getattr(self, key) not in FLIPS:
                raise ProfileError(
                    f"station {key} {getattr(self, key)!r} is not one of {', '.join(FLIPS)}"
                )
        for key in ("rotate_deg", "reference_rotate_deg"):
            v = getattr(self, key)
            if isinstance(v, bool) or v not in ROTATIONS:
                raise ProfileError(f"station {key} {v!r} is not 0, 90, 180 or 270")
        age = self.check_max_age_days
        if isinstance(age, bool) or not isinstance(age, int | float) or not 0 < age <= 366:
            raise ProfileError(
                f"station check_max_age_days {age!r} is not a number of days in (0, 366]"
            )
        if self.units is not None and self.units not in UNITS:
            raise ProfileError(f"station units {self.units!r} are not one of {', '.join(UNITS)}")
        if self.kind is not None and self.kind not in KINDS:
            raise ProfileError(f"station kind {self.kind!r} is not surface or wavefront")
        if self.dx_mm is not None and (
            isinstance(self.dx_mm, bool)
            or not isinstance(self.dx_mm, int | float)
            or not (math.isfinite(self.dx_mm) and self.dx_mm > 0)
        ):
            raise ProfileError(f"station dx_mm {self.dx_mm!r} is not a positive pixel pitch")
        if not isinstance(self.subtract_reference, bool):
            raise ProfileError(
                f"station subtract_reference {self.subtract_reference!r} is not true or false"
            )
        for key in ("format", "reference", "serial_pattern", "check_standard"):
            v = getattr(self, key)
            if v is not None and not (isinstance(v, str) and v.strip()):
                raise ProfileError(f"station {key} {v!r} is not a name")
        if self.serial_pattern is not None:
            try:
                groups = re.compile(self.serial_pattern).groupindex
            except re.error as exc:
                raise ProfileError(
                    f"station serial_pattern {self.serial_pattern!r} is not a regular expression: {exc}"
                ) from None
            if "serial" not in groups:
                raise ProfileError(
                    f"station serial_pattern {self.serial_pattern!r} has no group named 'serial'"
                )
        if not isinstance(self.settings, dict):
            raise ProfileError("station settings must be an object of analysis settings")
        try:
            AnalysisSettings.from_dict(self.settings)
        except (TypeError, ValueError) as exc:
            raise ProfileError(f"station analysis settings: {exc}") from None
        if self.subtract_reference and not self.reference:
            raise ProfileError("station subtract_reference needs a reference")

    @classmethod
    def keys(cls) -> tuple[str, ...]:
        return tuple(f.name for f in fields(cls))

    @classmethod
    def from_dict(cls, d: dict[str, Any] | None) -> StationProfile:
        """The profile a station's JSON describes; unknown keys and bad values are refused."""
        d = dict(d or {})
        unknown = set(d) - set(cls.keys())
        if unknown:
            raise ProfileError(
                f"unknown station profile keys: {', '.join(sorted(unknown))} "
                f"(known: {', '.join(cls.keys())})"
            )
        return cls(**d)

    def as_dict(self) -> dict[str, Any]:
        """The keys that differ from the defaults (what is stored)."""
        default = StationProfile()
        return {k: v for k, v in asdict(self).items() if v != getattr(default, k)}

    def analysis_settings(self) -> AnalysisSettings:
        return AnalysisSettings.from_dict(self.settings)

    def describe(self) -> str:
        """The profile in words, for a person reading a list of stations.

        >>> StationProfile(reference="TF-A", subtract_reference=True, flip="lr").describe()
        'reference TF-A, subtracted; maps flipped lr; no check standard'
        """
        parts = []
        if self.reference:
            parts.append(
                f"reference {self.reference}" + (", subtracted" if self.subtract_reference else "")
            )
        if self.flip != "none" or self.rotate_deg:
            turn = [f"flipped {self.flip}"] if self.flip != "none" else []
            turn += [f"turned {self.rotate_deg}°"] if self.rotate_deg else []
            parts.append("maps " + " then ".join(turn))
        parts.append(
            f"check standard {self.check_standard} (at most {self.check_max_age_days:g} days old)"
            if self.check_standard
            else "no check standard"
        )
        files = [
            w
            for w in (
                self.format,
                f"{self.dx_mm:g} mm pixels" if self.dx_mm else None,
                self.units,
                self.kind if self.kind == "wavefront" else None,
            )
            if w
        ]
        if files:
            parts.append("files: " + ", ".join(files))
        return "; ".join(parts)

    def subtracts_reference(self, given: bool | None = None) -> bool:
        """Whether an ingest subtracts the reference: as ``given``, else as the profile says."""
        return self.subtract_reference if given is None else given
