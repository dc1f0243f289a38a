"""NumPy ``.npy`` (a bare array) and ``.npz`` (array ``height`` plus metadata arrays) maps.

``.npz`` keys: ``height`` (2-D), and optional scalars ``dx_mm``, ``units``, ``wavelength_nm``,
``kind``. Pickled objects are never loaded.
"""

from __future__ import annotations

import zipfile
from pathlib import Path

import numpy as np

from shopdb.formats.common import FormatError, Metadata, build_map, merge
from shopdb.surface.maps import SurfaceMap

MAX_ENTRY_BYTES = 2 * 2**30


def _load(p: Path):
    try:
        return np.load(p, allow_pickle=False)
    except (ValueError, OSError, EOFError, zipfile.BadZipFile) as exc:
        raise FormatError(
            p, f"not a readable NumPy file ({str(exc).splitlines()[0][:120]})"
        ) from None


def _check(p: Path, data) -> np.ndarray:
    if not isinstance(data, np.ndarray) or data.ndim != 2:
        raise FormatError(p, f"expected a 2-D array, got shape {getattr(data, 'shape', '?')}")
    if not (np.issubdtype(data.dtype, np.floating) or np.issubdtype(data.dtype, np.integer)):
        raise FormatError(p, f"expected numbers, got dtype {data.dtype}")
    return data.astype(np.float64)


def read_npy(path: str | Path, given: Metadata = Metadata()) -> SurfaceMap:
    p = Path(path)
    data = _check(p, _load(p))
    meta = merge(p, {}, given)
    if meta["units"] is None:
        meta["units"] = "nm"  # a bare .npy is in nm unless told otherwise
    return build_map(p, data, meta, source={"file": p.name, "format": "npy"})


def read_npz(path: str | Path, given: Metadata = Metadata()) -> SurfaceMap:
    p = Path(path)
    try:
        with zipfile.ZipFile(p) as zf:
            if sum(i.file_size for i in zf.infolist()) > MAX_ENTRY_BYTES:
                raise FormatError(p, "uncompressed content exceeds 2 GiB")
    except zipfile.BadZipFile:
        raise FormatError(p, "not a readable .npz (bad zip)") from None
    with _load(p) as npz:
        if "height" not in npz.files:
            raise FormatError(
                p, f"no array named 'height' (found {', '.join(npz.files) or 'none'})"
            )
        data = _check(p, npz["height"])
        file_meta = {}
        for k in ("dx_mm", "wavelength_nm"):
            if k in npz.files:
                file_meta[k] = float(npz[k])
        for k in ("units", "kind"):
            if k in npz.files:
                file_meta[k] = str(npz[k])
    meta = merge(p, file_meta, given)
    return build_map(p, data, meta, source={"file": p.name, "format": "npz"})


def write_npz(path: str | Path, surface: SurfaceMap) -> None:
    np.savez_compressed(
        path,
        height=surface.height_nm,
        dx_mm=surface.dx_mm,
        units="nm",
        wavelength_nm=surface.wavelength_nm,
        kind=surface.kind,
    )
