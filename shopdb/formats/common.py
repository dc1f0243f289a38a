"""What every reader shares: metadata resolution and the one error type readers raise."""

from __future__ import annotations

import math
import struct
import zipfile
import zlib
from pathlib import Path

import numpy as np

from shopdb.formats.base import FormatError, Metadata
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


def check_pixels(path: Path, *shape: int, what: str = "the map") -> None:
    """Refuse a map larger than the pixel cap (``SHOPDB_MAX_PIXELS``) from its declared shape,
    before anything of that size is allocated; also a shape with a zero or negative side."""
    from shopdb.config import max_pixels

    cap = max_pixels()
    if any(int(n) < 1 for n in shape):
        raise FormatError(path, f"{what} has shape {' x '.join(map(str, shape))}")
    count = math.prod(int(n) for n in shape)
    if count > cap:
        raise FormatError(
            path,
            f"{what} is {' x '.join(map(str, shape))} = {count:,} pixels, over the limit of "
            f"{cap:,} (SHOPDB_MAX_PIXELS)",
        )


def npy_header(path: Path, fh) -> tuple[tuple[int, ...], np.dtype]:
    """Shape and dtype from a ``.npy`` stream's header, without reading its data."""
    try:
        version = np.lib.format.read_magic(fh)
        if version == (1, 0):
            shape, _, dtype = np.lib.format.read_array_header_1_0(fh)
        else:
            shape, _, dtype = np.lib.format.read_array_header_2_0(fh)
    except (ValueError, OSError, EOFError, SyntaxError) as exc:
        raise FormatError(path, f"not a readable NumPy array ({str(exc)[:100]})") from None
    return tuple(int(n) for n in shape), dtype


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
    missing = [k for k in ("dx_mm", "units") if meta.get(k) is None]
    if meta.get("units") in ("waves", "fringes") and meta.get("wavelength_nm") is None:
        missing.append("wavelength_nm")
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
            wavelength_nm=None
            if meta.get("wavelength_nm") is None
            else float(meta["wavelength_nm"]),
            kind=kind,
            source=source,
        )
    except (TypeError, ValueError) as exc:
        raise FormatError(path, str(exc)) from None
