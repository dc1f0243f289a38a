"""Plain text / CSV height grids.

One grid row per line; the delimiter (comma, semicolon, tab or white space) is sniffed from the
first data line. No data: ``NaN``, an empty cell, or a sentinel value given in the header
(``no_data: -9999``). An optional header of ``# key: value`` lines (or ``key: value`` lines before
the first numeric line) carries metadata: ``dx_mm``, ``units`` (nm, um, waves, fringes),
``wavelength_nm``, ``kind`` (surface, wavefront), ``no_data``; other keys are kept as source
metadata.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from shopdb.formats.common import FormatError, Metadata, build_map, check_pixels, merge
from shopdb.surface.maps import SurfaceMap

MAX_BYTES = 512 * 2**20
_NUMERIC_START = re.compile(r"^\s*([-+]?(\d|\.\d)|nan\b|[,;\t]|$)", re.IGNORECASE)
_FLOAT_KEYS = ("dx_mm", "wavelength_nm", "no_data")


def _split(line: str, delim: str | None) -> list[str]:
    return [c.strip() for c in (line.split(delim) if delim else line.split())]


def _sniff(line: str) -> str | None:
    for d in (",", ";", "\t"):
        if d in line:
            return d
    return None


def write_text(path: str | Path, surface: SurfaceMap, *, delimiter: str = ",") -> None:
    """Write a map as a text grid in nm with a metadata header (NaN for no data)."""
    p = Path(path)
    with p.open("w") as fh:
        fh.write(f"# dx_mm: {surface.dx_mm!r}\n# units: nm\n")
        if surface.wavelength_nm is not None:
            fh.write(f"# wavelength_nm: {surface.wavelength_nm!r}\n")
        fh.write(f"# kind: {surface.kind}\n")
        np.savetxt(fh, surface.height_nm, delimiter=delimiter, fmt="%.17g")


def read_text(path: str | Path, given: Metadata = Metadata()) -> SurfaceMap:
    """Two passes over the file: the first reads the header and counts the grid (refused over the
    pixel cap before anything of its size is allocated), the second parses each row into one
    preallocated array, so memory stays near the map's own 8 bytes per pixel."""
    p = Path(path)
    try:
        size = p.stat().st_size
        if size > MAX_BYTES:
            raise FormatError(
                p,
                f"file is {size / 2**20:.0f} MiB; text grids are limited to {MAX_BYTES // 2**20} MiB",
            )
        with p.open(encoding="utf-8") as fh:
            header, delim, width, rows = _scan(p, fh)
        check_pixels(p, rows, width, what="the grid")
        data = np.empty((rows, width), dtype=np.float64)
        with p.open(encoding="utf-8") as fh:
            _fill(p, fh, data, delim)
    except UnicodeDecodeError:
        raise FormatError(p, "not a UTF-8 text grid") from None
    except OSError as exc:
        raise FormatError(p, f"cannot read: {exc.strerror}") from None
    if "no_data" in header:
        data[data == header["no_data"]] = np.nan
    if not np.isfinite(data).any():
        raise FormatError(p, "the map has no valid pixels (all no-data)")
    meta = merge(p, header, given)
    source = {
        "file": p.name,
        "format": "text",
        **{k: v for k, v in header.items() if k not in meta},
    }
    return build_map(p, data, meta, source=source)


def _data_lines(fh):
    """(line number, line) of the data rows, after the header (blank and # lines skipped)."""
    for n, line in enumerate(fh, start=1):
        if line.strip() and not line.lstrip().startswith("#"):
            yield n, line


def _scan(p: Path, fh) -> tuple[dict[str, object], str | None, int, int]:
    """Pass 1: the header, the delimiter, the grid's width and its number of rows."""
    header: dict[str, object] = {}
    delim: str | None = None
    width = rows = 0
    in_header = True
    for n, raw in enumerate(fh, start=1):
        line = raw.strip()
        if not line:
            continue
        if in_header:
            body = line[1:].strip() if line.startswith("#") else line
            if line.startswith("#") or not _NUMERIC_START.match(line):
                if ":" in body:
                    k, v = body.split(":", 1)
                    header[k.strip().lower()[:64]] = v.strip()[:200]
                    if len(header) > 100:
                        raise FormatError(p, "more than 100 header entries")
                elif not line.startswith("#"):
                    raise FormatError(
                        p, f"line {n} is neither numeric data nor a 'key: value' header"
                    )
                continue
            in_header = False
            delim = _sniff(line)
            width = len(_split(raw.rstrip("\r\n"), delim))
        elif line.startswith("#"):
            continue
        cells = len(_split(raw.rstrip("\r\n"), delim))
        if cells != width:
            raise FormatError(p, f"ragged rows: line {n} has {cells} values, the first row {width}")
        rows += 1
    if rows == 0:
        raise FormatError(p, "no data rows")
    for key in _FLOAT_KEYS:
        if key in header:
            try:
                header[key] = float(str(header[key]))
            except ValueError:
                raise FormatError(p, f"header {key} is not a number: {header[key]!r}") from None
    return header, delim, width, rows


def _fill(p: Path, fh, data: np.ndarray, delim: str | None) -> None:
    """Pass 2: each data row parsed into its row of ``data`` (empty or NaN cells: no data)."""
    lines = _data_lines(fh)
    i = 0
    for lineno, line in lines:
        if not _NUMERIC_START.match(line.strip()) and i == 0:
            continue  # a 'key: value' header line
        cells = ["nan" if c == "" else c for c in _split(line.rstrip("\r\n"), delim)]
        try:
            data[i] = np.array(cells, dtype=np.float64)
        except ValueError:
            for col, cell in enumerate(cells, start=1):
                try:
                    float(cell)
                except ValueError:
                    raise FormatError(
                        p, f"line {lineno}, column {col}: {cell[:20]!r} is not a number"
                    ) from None
            raise
        i += 1
