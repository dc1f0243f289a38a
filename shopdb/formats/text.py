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

from shopdb.formats.common import FormatError, Metadata, build_map, merge
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
    p = Path(path)
    try:
        size = p.stat().st_size
        if size > MAX_BYTES:
            raise FormatError(
                p,
                f"file is {size / 2**20:.0f} MiB; text grids are limited to {MAX_BYTES // 2**20} MiB",
            )
        text = p.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise FormatError(p, "not a UTF-8 text grid") from None
    except OSError as exc:
        raise FormatError(p, f"cannot read: {exc.strerror}") from None
    header: dict[str, object] = {}
    lines = text.splitlines()
    i = 0
    while i < len(lines):
        line = lines[i].strip()
        if not line:
            i += 1
            continue
        body = line[1:].strip() if line.startswith("#") else line
        if line.startswith("#") or not _NUMERIC_START.match(line):
            if ":" in body:
                k, v = body.split(":", 1)
                header[k.strip().lower()] = v.strip()
            elif not line.startswith("#"):
                raise FormatError(
                    p, f"line {i + 1} is neither numeric data nor a 'key: value' header"
                )
            i += 1
            continue
        break
    data_lines = [
        (n + 1, ln)
        for n, ln in enumerate(lines[i:], start=i)
        if ln.strip() and not ln.lstrip().startswith("#")
    ]
    if not data_lines:
        raise FormatError(p, "no data rows")
    delim = _sniff(data_lines[0][1])
    for key in _FLOAT_KEYS:
        if key in header:
            try:
                header[key] = float(str(header[key]))
            except ValueError:
                raise FormatError(p, f"header {key} is not a number: {header[key]!r}") from None
    rows = []
    width = None
    for lineno, line in data_lines:
        cells = _split(line, delim)
        if width is None:
            width = len(cells)
        elif len(cells) != width:
            raise FormatError(
                p, f"ragged rows: line {lineno} has {len(cells)} values, the first row {width}"
            )
        row = []
        for col, cell in enumerate(cells, start=1):
            if cell == "" or cell.lower() == "nan":
                row.append(np.nan)
                continue
            try:
                row.append(float(cell))
            except ValueError:
                raise FormatError(
                    p, f"line {lineno}, column {col}: {cell[:20]!r} is not a number"
                ) from None
        rows.append(row)
    data = np.array(rows, dtype=np.float64)
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
