"""Readers and writers of open height-map formats; each returns a SurfaceMap. No database.

:data:`FORMATS` is the one registry: format name, file suffixes, reader and writer, what the
format is, and how its rows are turned to shopdb's axis convention (:mod:`shopdb.surface.orient`).
The command line's help, the README's table and the app's upload types derive from it. A reader
module is imported only when a file of its format is read.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from shopdb.formats.base import FormatError, Metadata

if TYPE_CHECKING:
    from shopdb.surface.maps import SurfaceMap


@dataclass(frozen=True)
class Format:
    name: str
    suffixes: tuple[str, ...]
    module: str  # shopdb.formats.<module> holds read_<...> and write_<...>
    reader: str
    writer: str | None
    description: str
    axes: str  # where +y points in the file, and what the reader does about it


FORMATS: tuple[Format, ...] = (
    Format(
        "x3p",
        (".x3p",),
        "x3p",
        "read_x3p",
        "write_x3p",
        "ISO 25178-72 XML 3D surface profile (zip; MD5 checked; no XML entities or DTDs)",
        "its own axes: y increases from one row of data to the next; rows reversed on reading",
    ),
    Format(
        "text",
        (".txt", ".csv", ".asc", ".dat"),
        "text",
        "read_text",
        "write_text",
        "text/CSV grid: delimiter sniffed, NaN/empty/`no_data:` sentinel, `# key: value` header",
        "an image: the first row is the top, +y towards it",
    ),
    Format(
        "npy",
        (".npy",),
        "numpy_io",
        "read_npy",
        None,
        "NumPy array of heights (nm unless told), no pickles",
        "an image: the first row is the top, +y towards it",
    ),
    Format(
        "npz",
        (".npz",),
        "numpy_io",
        "read_npz",
        "write_npz",
        "NumPy archive: `height` plus `dx_mm`, `units`, `wavelength_nm`, `kind`; or raw "
        "interferograms `frames` with `algorithm`",
        "an image: the first row is the top, +y towards it",
    ),
    Format(
        "hdf5",
        (".h5", ".hdf5"),
        "hdf5",
        "read_hdf5",
        "write_hdf5",
        "HDF5 dataset `/height` with those attributes (no external or virtual storage)",
        "an image: the first row is the top, +y towards it",
    ),
    Format(
        "tiff",
        (".tif", ".tiff"),
        "tiff",
        "read_tiff",
        "write_tiff",
        "32- or 64-bit float TIFF (nm unless its description says otherwise)",
        "an image: the first row is the top, +y towards it",
    ),
)
BY_NAME = {f.name: f for f in FORMATS}
SUFFIXES = {s: f.name for f in FORMATS for s in f.suffixes}
READERS = tuple(f.name for f in FORMATS)
WRITERS = tuple(f.name for f in FORMATS if f.writer)


def names_help() -> str:
    """``x3p, text, npy, npz, hdf5, tiff`` for option help and errors."""
    return ", ".join(READERS)


def detect_format(path: Path) -> str:
    fmt = SUFFIXES.get(path.suffix.lower())
    if fmt is None:
        raise FormatError(
            path,
            f"unknown file type {path.suffix or '(none)'}; give the format ({names_help()})",
        )
    return fmt


def _function(fmt: Format, name: str):
    return getattr(importlib.import_module(f"shopdb.formats.{fmt.module}"), name)


def read_map(
    path: str | Path, *, format: str | None = None, metadata: Metadata = Metadata()
) -> SurfaceMap:
    """Read a height map; ``format`` defaults to the file extension."""
    p = Path(path)
    if not p.is_file():
        raise FormatError(p, "no such file")
    name = format or detect_format(p)
    if name not in BY_NAME:
        raise FormatError(p, f"unknown format {name!r} (expected one of {names_help()})")
    fmt = BY_NAME[name]
    return _function(fmt, fmt.reader)(p, metadata)


def write_map(path: str | Path, surface: SurfaceMap, *, format: str | None = None) -> None:
    p = Path(path)
    name = format or detect_format(p)
    fmt = BY_NAME.get(name)
    if fmt is None or fmt.writer is None:
        raise FormatError(p, f"cannot write format {name!r} (writers: {', '.join(WRITERS)})")
    _function(fmt, fmt.writer)(p, surface)


__all__ = [
    "FORMATS",
    "READERS",
    "WRITERS",
    "Format",
    "FormatError",
    "Metadata",
    "detect_format",
    "read_map",
    "write_map",
]
