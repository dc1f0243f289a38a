"""How a map is analysed (:class:`AnalysisSettings`): plain data, importable without the numeric
libraries, so a station profile or a stored result can be read without loading them.

Notes
-----
The settings name the clear aperture, removed terms, Zernike order and PSD bands of
ISO 10110-5:2015 §4 and ISO 14999-4:2015 §3; see :mod:`shopdb.surface.analysis`.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import math
from dataclasses import asdict, dataclass

PSD_WINDOWS = ("hann", "none")
REMOVABLE = ("piston", "tilt", "power")
# Band split common in high-power-laser optics (form > 33 mm period, mid-spatial 33-0.12 mm,
# roughness below 0.12 mm); J. Eur. Opt. Soc.-Rapid Publ. 2017, after Aikens, Wolfe & Lawson,
# SPIE 2576 (1995). Shops set their own bands per drawing.
DEFAULT_BAND_EDGES = (0.0, 1 / 33, 1 / 0.12, math.inf)


@dataclass(frozen=True)
class AnalysisSettings:
    """How a map is analysed. Frozen and hashable; its :attr:`digest` is stored with results.

    Notes
    -----
    The clear aperture, removed terms, Zernike order and PSD bands of ISO 10110-5:2015 §4 and
    ISO 14999-4:2015 §3 (see the module notes); the PVr order after Evans, Opt. Eng. 48(4)
    043605 (2009). The digest is the SHA-256 of the canonical JSON of :meth:`as_dict`.
    """

    aperture: str = "circular"
    clear_aperture_fraction: float | None = None
    clear_aperture_mm: float | None = None
    obscuration_fraction: float = 0.0
    obscuration_mm: float | None = None
    edge_exclusion_mm: float = 0.0
    rect_size_mm: tuple[float, float] | None = None
    remove: tuple[str, ...] = ("piston", "tilt")
    zernike_order: int = 10
    zernike_basis: str = "circle"
    pvr_order: int | None = None  # None: min(7, zernike_order) — 36 terms at order 7
    psd_band_edges_per_mm: tuple[float, ...] = DEFAULT_BAND_EDGES
    psd_window: str = "hann"
    outlier_sigma: float | None = None

    def __post_init__(self) -> None:
        unknown = set(self.remove) - set(REMOVABLE)
        if unknown:
            raise ValueError(f"cannot remove {sorted(unknown)}: choose from {', '.join(REMOVABLE)}")
        object.__setattr__(self, "remove", tuple(t for t in REMOVABLE if t in self.remove))
        if not 1 <= self.zernike_order <= 30:
            raise ValueError(f"Zernike order must be 1..30, got {self.zernike_order}")
        pvr_order = min(7, self.zernike_order) if self.pvr_order is None else self.pvr_order
        object.__setattr__(self, "pvr_order", pvr_order)
        if not 1 <= pvr_order <= self.zernike_order:
            raise ValueError(
                f"PVr order must be 1..zernike_order ({self.zernike_order}), got {pvr_order}"
            )
        if self.zernike_basis not in ("circle", "annular"):
            raise ValueError(f"Zernike basis {self.zernike_basis!r} is not 'circle' or 'annular'")
        if self.zernike_basis == "annular" and self.aperture != "annular":
            raise ValueError("annular Zernike polynomials need an annular aperture")
        if self.psd_window not in PSD_WINDOWS:
            raise ValueError(
                f"PSD window {self.psd_window!r} is not one of {', '.join(PSD_WINDOWS)}"
            )
        if self.outlier_sigma is not None and not self.outlier_sigma > 0:
            raise ValueError(f"outlier filter sigma must be > 0, got {self.outlier_sigma}")
        edges = tuple(float(e) for e in self.psd_band_edges_per_mm)
        if len(edges) < 2 or any(b <= a for a, b in itertools.pairwise(edges)) or edges[0] < 0:
            raise ValueError(f"PSD band edges must increase from >= 0, got {list(edges)}")
        object.__setattr__(self, "psd_band_edges_per_mm", edges)

    def as_dict(self) -> dict:
        d = asdict(self)
        d["psd_band_edges_per_mm"] = [
            None if math.isinf(e) else e for e in self.psd_band_edges_per_mm
        ]
        d["remove"] = list(self.remove)
        return d

    @classmethod
    def from_dict(cls, d: dict) -> AnalysisSettings:
        d = dict(d)
        if "psd_band_edges_per_mm" in d:
            d["psd_band_edges_per_mm"] = tuple(
                math.inf if e is None else e for e in d["psd_band_edges_per_mm"]
            )
        for k in ("remove", "rect_size_mm"):
            if d.get(k) is not None:
                d[k] = tuple(d[k])
        unknown = set(d) - set(cls.__dataclass_fields__)
        if unknown:
            raise ValueError(f"unknown analysis settings: {', '.join(sorted(unknown))}")
        return cls(**d)

    @property
    def digest(self) -> str:
        """SHA-256 of the canonical JSON of the settings."""
        text = json.dumps(self.as_dict(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode()).hexdigest()
