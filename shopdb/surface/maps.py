"""SurfaceMap: a measured height map with its units made explicit."""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import Any

import numpy as np

KINDS = ("surface", "wavefront")
UNITS = ("nm", "um", "waves", "fringes")


def _check_positive(name: str, value: float | None, *, required: bool = True) -> None:
    if value is None:
        if required:
            raise ValueError(f"{name} is required")
        return
    if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be a positive finite number, got {value!r}")


@dataclass(frozen=True, eq=False)
class SurfaceMap:
    """A height map.

    Parameters
    ----------
    height_nm : ndarray, 2-D float64 — heights in nm; NaN where there is no data. Rows run down
        the image, columns to the right.
    dx_mm : float — pixel pitch in mm (square pixels).
    wavelength_nm : float or None — test wavelength in nm (None for a map in nm or µm whose
        wavelength is not known: it has no fringe values).
    kind : ``"surface"`` (height of the part) or ``"wavefront"`` (optical path of the test beam;
        in reflection twice the surface). Conversion is explicit: :meth:`to_surface`.
    centre_rc : (row, col) of the aperture centre in pixels, or None to fit it.
    radius_px : aperture radius in pixels, or None to fit it.
    source : free metadata (file name, instrument, ...).

    Notes
    -----
    In reflection (double pass) surface height is half the wavefront; one fringe is lambda/2 of
    surface (ISO 14999-4; shared/REFERENCES.md).
    """

    height_nm: np.ndarray
    dx_mm: float
    wavelength_nm: float | None
    kind: str = "surface"
    centre_rc: tuple[float, float] | None = None
    radius_px: float | None = None
    source: Any = field(default_factory=dict)

    def __post_init__(self) -> None:
        h = np.asarray(self.height_nm, dtype=np.float64)
        if h.ndim != 2:
            raise ValueError(f"height map must be 2-D, got shape {h.shape}")
        if min(h.shape) < 2:
            raise ValueError(
                f"height map must be at least 2 x 2 pixels, got {h.shape[0]} x {h.shape[1]}"
            )
        if np.isinf(h).any():
            raise ValueError("height map holds infinite values; use NaN for missing data")
        h.setflags(write=False)
        object.__setattr__(self, "height_nm", h)
        _check_positive("pixel pitch dx_mm", self.dx_mm)
        _check_positive("wavelength_nm", self.wavelength_nm, required=False)
        if self.kind not in KINDS:
            raise ValueError(f"map kind {self.kind!r} is not one of {', '.join(KINDS)}")
        if self.radius_px is not None:
            _check_positive("radius_px", self.radius_px)
        object.__setattr__(self, "source", MappingProxyType(dict(self.source)))

    @classmethod
    def from_array(
        cls,
        data,
        *,
        units: str,
        dx_mm: float,
        wavelength_nm: float | None = None,
        kind: str = "surface",
        **kw,
    ) -> SurfaceMap:
        """Build from an array in ``units``: nm, um, waves or fringes.

        Waves are of the test wavelength, in the map's own kind (a wavefront in waves is
        ``waves * lambda`` of optical path). Fringes are of a double-pass (reflection) test:
        one fringe is lambda/2 of surface height, i.e. lambda of reflected wavefront
        (ISO 14999-4); waves and fringes need the wavelength.
        """
        if units not in UNITS:
            raise ValueError(f"units {units!r} are not one of {', '.join(UNITS)}")
        if units in ("waves", "fringes") and wavelength_nm is None:
            raise ValueError(f"units {units!r} need the test wavelength (wavelength_nm)")
        _check_positive("wavelength_nm", wavelength_nm, required=False)
        arr = np.asarray(data, dtype=np.float64)
        if units == "um":
            arr = arr * 1000.0
        elif wavelength_nm is not None and units == "waves":
            arr = arr * wavelength_nm
        elif wavelength_nm is not None and units == "fringes":
            arr = arr * (wavelength_nm / 2 if kind == "surface" else wavelength_nm)
        return cls(arr, dx_mm, wavelength_nm, kind, **kw)

    def to_surface(self) -> SurfaceMap:
        """Surface height from a reflected (double-pass) wavefront: half of it."""
        if self.kind == "surface":
            return self
        return replace(self, height_nm=self.height_nm / 2, kind="surface")

    def to_wavefront(self) -> SurfaceMap:
        """Reflected wavefront of a surface: twice its height."""
        if self.kind == "wavefront":
            return self
        return replace(self, height_nm=self.height_nm * 2, kind="wavefront")

    @property
    def shape(self) -> tuple[int, int]:
        return self.height_nm.shape

    @property
    def nm_per_fringe(self) -> float:
        """One fringe of a double-pass test in this map's units (lambda/2 surface, lambda wavefront)."""
        if self.wavelength_nm is None:
            raise ValueError("the map has no test wavelength, so it has no fringe values")
        return self.wavelength_nm / 2 if self.kind == "surface" else self.wavelength_nm
