"""HDF5 height maps (h5py): a 2-D dataset (default ``/height``) whose attributes may carry
``dx_mm``, ``units``, ``wavelength_nm`` and ``kind``.

Only data inside the file is read: the dataset must be reached by a hard link, be stored
contiguously or in chunks in the file itself, and carry no external storage, virtual sources or
filters outside the built-in ones; external links, soft links and user-block tricks are refused
(an HDF5 file can otherwise point at any file on the server).
"""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np

from shopdb.formats.common import FormatError, Metadata, build_map, check_pixels, merge
from shopdb.surface.maps import SurfaceMap


def read_hdf5(
    path: str | Path, given: Metadata = Metadata(), *, dataset: str = "height"
) -> SurfaceMap:
    p = Path(path)
    try:
        with h5py.File(p, "r") as f:
            link = f.get(dataset, getlink=True)
            if link is None:
                raise FormatError(
                    p, f"no dataset {dataset!r} (found {', '.join(f.keys()) or 'none'})"
                )
            if not isinstance(link, h5py.HardLink):
                raise FormatError(
                    p, f"{dataset!r} is a {type(link).__name__}; only data inside the file is read"
                )
            ds = f[dataset]
            if not isinstance(ds, h5py.Dataset) or ds.ndim != 2:
                raise FormatError(p, f"{dataset!r} is not a 2-D dataset")
            if ds.is_virtual or ds.external:
                raise FormatError(
                    p, f"{dataset!r} keeps its data outside the file (virtual or external storage)"
                )
            check_pixels(p, *ds.shape, what=repr(dataset))
            if not np.issubdtype(ds.dtype, np.number):
                raise FormatError(p, f"{dataset!r} holds {ds.dtype}, not numbers")
            data = ds[()].astype(np.float64)
            attrs: dict[str, float | str] = {}
            for k in ("dx_mm", "wavelength_nm"):
                if k in ds.attrs:
                    attrs[k] = float(ds.attrs[k])
            for k in ("units", "kind"):
                if k in ds.attrs:
                    v = ds.attrs[k]
                    attrs[k] = v.decode() if isinstance(v, bytes) else str(v)
    except FormatError:
        raise
    except (OSError, ValueError, KeyError) as exc:
        raise FormatError(p, f"not a readable HDF5 file ({str(exc)[:100]})") from None
    meta = merge(p, attrs, given)
    return build_map(p, data, meta, source={"file": p.name, "format": "hdf5", "dataset": dataset})


def write_hdf5(path: str | Path, surface: SurfaceMap, *, dataset: str = "height") -> None:
    with h5py.File(path, "w") as f:
        ds = f.create_dataset(dataset, data=surface.height_nm, compression="gzip")
        ds.attrs.update(
            {
                "dx_mm": surface.dx_mm,
                "units": "nm",
                "kind": surface.kind,
            }
            | ({"wavelength_nm": surface.wavelength_nm} if surface.wavelength_nm else {})
        )
