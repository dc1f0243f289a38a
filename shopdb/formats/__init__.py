"""Readers and writers of open height-map formats; each returns a SurfaceMap. No database."""

from __future__ import annotations

from pathlib import Path

from shopdb.formats.common import FormatError, Metadata
from shopdb.formats.numpy_io import read_npy, read_npz
from shopdb.formats.text import read_text
from shopdb.surface.maps import SurfaceMap

READERS = {"npy": read_npy, "npz": read_npz, "text": read_text}
SUFFIXES = {
    ".npy": "npy",
    ".npz": "npz",
    ".txt": "text",
    ".csv": "text",
    ".asc": "text",
    ".dat": "text",
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


__all__ = ["READERS", "FormatError", "Metadata", "detect_format", "read_map"]
