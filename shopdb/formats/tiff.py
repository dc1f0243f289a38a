"""32-bit float TIFF height maps (tifffile). Heights in the units the caller states (nm by
default); shopdb's own writer puts ``dx_mm``, ``units``, ``wavelength_nm`` and ``kind`` as JSON in
the ImageDescription tag, and the reader takes them from there when present."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import tifffile

from shopdb.formats.common import FormatError, Metadata, build_map, check_pixels, merge
from shopdb.surface.maps import SurfaceMap


def read_tiff(path: str | Path, given: Metadata = Metadata()) -> SurfaceMap:
    p = Path(path)
    try:
        with tifffile.TiffFile(p) as tf:
            if not tf.pages:
                raise FormatError(p, "the TIFF has no image")
            page = tf.pages[0]
            if len(page.shape) != 2:
                raise FormatError(p, f"expected a single-channel 2-D image, got shape {page.shape}")
            if page.dtype != np.float32 and page.dtype != np.float64:
                raise FormatError(p, f"expected 32-bit float heights, got {page.dtype}")
            check_pixels(p, *page.shape, what="the image")
            data = page.asarray().astype(np.float64)
            desc = getattr(page, "description", "") or ""
    except FormatError:
        raise
    except Exception as exc:  # tifffile raises many types on damaged files
        raise FormatError(
            p, f"not a readable TIFF ({type(exc).__name__}: {str(exc)[:100]})"
        ) from None
    file_meta = {}
    if desc.startswith("{"):
        try:
            d = json.loads(desc)
        except json.JSONDecodeError:
            d = {}
        file_meta = {k: d[k] for k in ("dx_mm", "units", "wavelength_nm", "kind") if k in d}
    meta = merge(p, file_meta, given)
    if meta["units"] is None:
        meta["units"] = "nm"
    return build_map(p, data, meta, source={"file": p.name, "format": "tiff"})


def write_tiff(path: str | Path, surface: SurfaceMap) -> None:
    desc = json.dumps(
        {
            "dx_mm": surface.dx_mm,
            "units": "nm",
            "wavelength_nm": surface.wavelength_nm,
            "kind": surface.kind,
        },
        allow_nan=False,
    )
    tifffile.imwrite(path, surface.height_nm.astype(np.float32), description=desc, metadata=None)
