"""NumPy ``.npy`` (a bare array) and ``.npz`` (array ``height`` plus metadata arrays) maps.

``.npz`` keys: ``height`` (2-D), and optional scalars ``dx_mm``, ``units``, ``wavelength_nm``,
``kind``. Pickled objects are never loaded.

Raw interferograms: an ``.npz`` holding ``frames`` (K x rows x cols intensities) instead of
``height``, with ``algorithm`` (lsq, hariharan5, carre, fourier), ``steps_rad`` (for lsq),
optional ``modulation_threshold`` (default 0.1) and ``reflection`` (default true: a double-pass
test of a surface), is turned into a height map by :mod:`shopdb.surface.phase`.
"""

from __future__ import annotations

import zipfile
from pathlib import Path

import numpy as np

from shopdb.formats.common import (
    ZIP_ERRORS,
    FormatError,
    Metadata,
    build_map,
    check_pixels,
    merge,
    npy_header,
)
from shopdb.surface.maps import SurfaceMap

MAX_ENTRY_BYTES = 2 * 2**30
MAX_FRAMES = 64  # phase-shifted interferograms in one file


def _load(p: Path):
    try:
        return np.load(p, allow_pickle=False)
    except ZIP_ERRORS as exc:
        first = (str(exc).splitlines() or [""])[0][:120]
        raise FormatError(p, f"not a readable NumPy file ({first})") from None


def _check(p: Path, data) -> np.ndarray:
    if not isinstance(data, np.ndarray) or data.ndim != 2:
        raise FormatError(p, f"expected a 2-D array, got shape {getattr(data, 'shape', '?')}")
    if not (np.issubdtype(data.dtype, np.floating) or np.issubdtype(data.dtype, np.integer)):
        raise FormatError(p, f"expected numbers, got dtype {data.dtype}")
    return data.astype(np.float64)


def _check_header(p: Path, shape: tuple[int, ...], dtype: np.dtype, name: str) -> None:
    """A member's declared shape and type, checked before its data is read."""
    if dtype.hasobject:
        raise FormatError(p, f"{name} holds Python objects, not numbers")
    if name == "frames":
        if len(shape) != 3:
            raise FormatError(p, f"'frames' must be K x rows x cols, got shape {shape}")
        if shape[0] > MAX_FRAMES:
            raise FormatError(p, f"'frames' holds {shape[0]} frames; at most {MAX_FRAMES}")
        check_pixels(p, *shape[1:], what="each frame")
    elif len(shape) == 2:
        check_pixels(p, *shape, what=name)


def read_npy(path: str | Path, given: Metadata = Metadata()) -> SurfaceMap:
    p = Path(path)
    try:
        with p.open("rb") as fh:
            shape, dtype = npy_header(p, fh)
    except OSError as exc:
        raise FormatError(p, f"cannot read: {exc.strerror}") from None
    _check_header(p, shape, dtype, "the array")
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
            for name in ("height", "frames"):
                if f"{name}.npy" in zf.namelist():
                    with zf.open(f"{name}.npy") as fh:
                        _check_header(p, *npy_header(p, fh), name)
    except FormatError:
        raise
    except ZIP_ERRORS:
        raise FormatError(p, "not a readable .npz (bad zip)") from None
    try:
        with _load(p) as npz:
            if "frames" in npz.files and "height" not in npz.files:
                return _from_frames(p, npz, given)
            if "height" not in npz.files:
                raise FormatError(
                    p, f"no array named 'height' (found {', '.join(npz.files) or 'none'})"
                )
            data = _check(p, npz["height"])
            file_meta: dict[str, float | str] = {}
            for k in ("dx_mm", "wavelength_nm"):
                if k in npz.files:
                    file_meta[k] = float(npz[k])
            for k in ("units", "kind"):
                if k in npz.files:
                    file_meta[k] = str(npz[k])
    except FormatError:
        raise
    except ZIP_ERRORS as exc:  # the arrays of an .npz are read lazily, here
        raise FormatError(
            p, f"not a readable .npz ({(str(exc).splitlines() or [''])[0][:120]})"
        ) from None
    meta = merge(p, file_meta, given)
    return build_map(p, data, meta, source={"file": p.name, "format": "npz"})


def _from_frames(p: Path, npz, given: Metadata) -> SurfaceMap:
    from shopdb.surface import phase

    frames = npz["frames"]
    if frames.ndim != 3:
        raise FormatError(p, f"'frames' must be K x rows x cols, got shape {frames.shape}")
    algorithm = str(npz["algorithm"]) if "algorithm" in npz.files else "lsq"
    steps = npz["steps_rad"] if "steps_rad" in npz.files else None
    threshold = float(npz["modulation_threshold"]) if "modulation_threshold" in npz.files else 0.1
    reflection = bool(npz["reflection"]) if "reflection" in npz.files else True
    file_meta = {k: float(npz[k]) for k in ("dx_mm", "wavelength_nm") if k in npz.files}
    meta = merge(p, {**file_meta, "units": "nm"}, given)
    if meta.get("wavelength_nm") is None:
        raise FormatError(p, "interferograms need the test wavelength (wavelength_nm)")
    try:
        unwrapped, _ = phase.retrieve(
            frames, algorithm=algorithm, steps_rad=steps, modulation_threshold=threshold
        )
    except ValueError as exc:
        raise FormatError(p, str(exc)) from None
    height = phase.phase_to_height_nm(
        unwrapped, float(meta["wavelength_nm"]), reflection=reflection
    )
    meta["kind"] = "surface" if reflection else "wavefront"
    return build_map(
        p, height, meta, source={"file": p.name, "format": "frames", "algorithm": algorithm}
    )


def write_npz(path: str | Path, surface: SurfaceMap) -> None:
    arrays: dict[str, object] = {
        "height": surface.height_nm,
        "dx_mm": surface.dx_mm,
        "units": "nm",
        "kind": surface.kind,
    }
    if surface.wavelength_nm is not None:
        arrays["wavelength_nm"] = surface.wavelength_nm
    np.savez_compressed(path, **arrays)  # type: ignore[arg-type]
