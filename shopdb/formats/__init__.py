"""Readers and writers of open height-map formats; each returns a SurfaceMap. No database."""

from __future__ import annotations

from pathlib import Path

from shopdb.formats.common import FormatError, Metadata
from shopdb.formats.hdf5 import read_hdf5, write_hdf5
from shopdb.formats.numpy_io import read_npy, read_npz, write_npz
from shopdb.formats.text import read_text, write_text
from shopdb.formats.tiff import read_tiff, write_tiff
from shopdb.formats.x3p import read_x3p, write_x3p
from shopdb.surface.maps import SurfaceMap

READERS = {
    "x3p": read_x3p,
    "npy": read_npy,
    "npz": read_npz,
    "text": read_text,
    "tiff": read_tiff,
    "hdf5": read_hdf5,
}
WRITERS = {
    "x3p": write_x3p,
    "npz": write_npz,
    "text": write_text,
    "tiff": write_tiff,
    "hdf5": write_hdf5,
}
SUFFIXES = {
    ".x3p": "x3p",
    ".npy": "npy",
    ".npz": "npz",
    ".txt": "text",
    ".csv": "text",
    ".asc": "text",
    ".dat": "text",
    ".tif": "tiff",
    ".tiff": "tiff",
    ".h5": "hdf5",
    ".hdf5": "hdf5",
}


def detect_format(path: Path) -> str:
    fmt = SUFFIXES.get(path.suffix.lower())
    if fmt is None:
        raise FormatError(
            path,
            f"unknown file type {path.suffix or '(none)'}; give the format "
            f"({', '.join(sorted(READERS))})",
        )
    return fmt


def read_map(
    path: str | Path, *, format: str | None = None, metadata: Metadata = Metadata()
) -> SurfaceMap:
    """Read a height map; ``format`` defaults to the file extension."""
    p = Path(path)
    if not p.is_file():
        raise FormatError(p, "no such file")
    fmt = format or detect_format(p)
    if fmt not in READERS:
        raise FormatError(
            p, f"unknown format {fmt!r} (expected one of {', '.join(sorted(READERS))})"
        )
    return READERS[fmt](p, metadata)


def write_map(path: str | Path, surface: SurfaceMap, *, format: str | None = None) -> None:
    p = Path(path)
    fmt = format or detect_format(p)
    if fmt not in WRITERS:
        raise FormatError(p, f"cannot write format {fmt!r} (writers: {', '.join(sorted(WRITERS))})")
    WRITERS[fmt](p, surface)


__all__ = [
    "READERS",
    "WRITERS",
    "FormatError",
    "Metadata",
    "detect_format",
    "read_map",
    "write_map",
]
