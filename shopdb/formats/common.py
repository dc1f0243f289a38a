"""What every reader shares: metadata resolution and the one error type readers raise."""

from __future__ import annotations

import math
import struct
import zipfile
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from shopdb.surface.maps import KINDS, UNITS, SurfaceMap

# What the standard library's zipfile can raise on a damaged or hostile archive (central directory,
# local headers, compressed streams); found by fuzzing the readers.
ZIP_ERRORS = (
    zipfile.BadZipFile,
    zlib.error,
    OSError,
    EOFError,
    NotImplementedError,
    RuntimeError,
    UnicodeDecodeError,
    ValueError,
    struct.error,
    OverflowError,
)


class FormatError(ValueError):
    """A file cannot be read as a height map; the message names the file and the problem."""

    def __init__(self, path: str | Path, problem: str) -> None:
        self.path = str(path)
        self.problem = problem
        super().__init__(f"{Path(path).name}: {problem}")


@dataclass(frozen=True)
class Metadata:
    """Metadata a caller supplies (command-line options or a station profile); None = unknown."""

    dx_mm: float | None = None
    units: str | None = None
    wavelength_nm: float | None = None
    kind: str | None = None


def _same(a: float, b: float) -> bool:
    return math.isclose(a, b, rel_tol=1e-6, abs_tol=0.0)


def merge(path: Path, from_file: dict, given: Metadata) -> dict:
    """Combine file metadata with supplied metadata; a conflict is an error, never a silent choice."""
    out = {}
    for key in ("dx_mm", "units", "wavelength_nm", "kind"):
        f, g = from_file.get(key), getattr(given, key)
        if f is not None and g is not None:
            equal = _same(float(f), float(g)) if isinstance(f, int | float) else f == g
            if not equal:
                raise FormatError(path, f"{key} is {f} in the file but {g} was given")
        out[key] = f if f is not None else g
    return out


def build_map(path: Path, data: np.ndarray, meta: dict, *, source: dict) -> SurfaceMap:
    """SurfaceMap from raw data and resolved metadata, with file-named errors."""
    missing = [k for k in ("dx_mm", "units", "wavelength_nm") if meta.get(k) is None]
    if missing:
        raise FormatError(
            path,
            f"{', '.join(missing)} not in the file and not given (use options or a station profile)",
        )
    if meta["units"] not in UNITS:
        raise FormatError(
            path, f"unknown units {meta['units']!r} (expected one of {', '.join(UNITS)})"
        )
    kind = meta.get("kind") or "surface"
    if kind not in KINDS:
        raise FormatError(path, f"unknown kind {kind!r} (expected surface or wavefront)")
    try:
        return SurfaceMap.from_array(
            data,
            units=meta["units"],
            dx_mm=float(meta["dx_mm"]),
            wavelength_nm=float(meta["wavelength_nm"]),
            kind=kind,
            source=source,
        )
    except (TypeError, ValueError) as exc:
        raise FormatError(path, str(exc)) from None
