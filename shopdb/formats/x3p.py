"""ISO 25178-72 X3P surface files (zip of main.xml, md5checksum.hex and bindata/).

Reading is defensive: the zip's entry count and declared uncompressed sizes are checked before
anything is extracted; main.xml is parsed with defusedxml (no entity expansion, no DTD or
external fetch); the MD5 of main.xml (md5checksum.hex) and of the point data (and of the valid
points, when given) are verified; the binary length must match SizeX x SizeY x the data type.

Mapping: the heights are ``raw * CZ.Increment + CZ.Offset`` metres, shown here in nm. X3P stores
the points x fastest with y increasing from one row of data to the next; shopdb's maps have +y
towards row 0 (:mod:`shopdb.surface.orient`), so the reader reverses the row order and the
writer writes the rows bottom first (column = x index either way). The pixel pitch is
CX.Increment (must equal CY.Increment: shopdb maps have square pixels). Invalid points are NaN
in floating-point data, or the cleared bits of bindata/valid.bin (least significant bit first)
for integer data. The test wavelength is not part of X3P: it comes from the caller.

Why not a library: at the time of writing the one maintained X3P package on PyPI (x3pio) reads
safely, but shopdb needs its own caps and error messages at the file boundary, and an
independent writer to check against; x3pio serves as that reference writer in the tests.
"""

from __future__ import annotations

import hashlib
import io
import zipfile
from pathlib import Path
from xml.sax.saxutils import escape

import numpy as np
from defusedxml import ElementTree as SafeET
from defusedxml.common import DefusedXmlException

from shopdb.formats.common import ZIP_ERRORS, FormatError, Metadata, build_map, check_pixels, merge
from shopdb.surface.maps import SurfaceMap

MAX_ENTRIES = 32
MAX_UNCOMPRESSED = 2 * 2**30  # all entries together
MAX_XML = 4 * 2**20
_DTYPES: dict[str, np.dtype] = {
    "I": np.dtype("<i2"),
    "L": np.dtype("<i4"),
    "F": np.dtype("<f4"),
    "D": np.dtype("<f8"),
}
_NS = "{http://www.opengps.eu/2008/ISO5436_2}"


def _text(root, path: str, p: Path, *, required: bool = True) -> str | None:
    el = root.find(path)
    if el is None or el.text is None:
        if required:
            raise FormatError(p, f"main.xml has no {path.replace('/', ' > ')}")
        return None
    return el.text.strip()


def _required(root, path: str, p: Path) -> str:
    t = _text(root, path, p)
    assert t is not None  # _text raises for a required element
    return t


def _float(root, path: str, p: Path, default: float | None = None) -> float:
    t = _text(root, path, p, required=default is None)
    if t is None:
        assert default is not None
        return float(default)
    try:
        return float(t)
    except ValueError:
        raise FormatError(
            p, f"main.xml {path.replace('/', ' > ')} is not a number: {t[:20]!r}"
        ) from None


def _read_entry(zf: zipfile.ZipFile, name: str, p: Path, limit: int) -> bytes:
    try:
        info = zf.getinfo(name)
    except KeyError:
        raise FormatError(p, f"the archive has no {name}") from None
    if info.file_size > limit:
        raise FormatError(p, f"{name} declares {info.file_size} bytes, over the limit of {limit}")
    try:
        with zf.open(info) as fh:
            data = fh.read(limit + 1)
    except ZIP_ERRORS as exc:  # damaged, encrypted or unsupported entries
        raise FormatError(p, f"{name} cannot be read ({exc})") from None
    if len(data) > limit:
        raise FormatError(p, f"{name} expands beyond its declared size")
    return data


def read_x3p(path: str | Path, given: Metadata = Metadata()) -> SurfaceMap:
    p = Path(path)
    try:
        zf = zipfile.ZipFile(p)
    except ZIP_ERRORS as exc:
        raise FormatError(p, f"not an X3P file (not a readable zip: {exc})") from None
    with zf:
        infos = zf.infolist()
        if len(infos) > MAX_ENTRIES:
            raise FormatError(
                p, f"the archive has {len(infos)} entries; at most {MAX_ENTRIES} are accepted"
            )
        total = sum(i.file_size for i in infos)
        if total > MAX_UNCOMPRESSED:
            raise FormatError(
                p,
                f"the archive expands to {total / 2**30:.1f} GiB; at most {MAX_UNCOMPRESSED / 2**30:.0f} GiB",
            )
        xml = _read_entry(zf, "main.xml", p, MAX_XML)
        if "md5checksum.hex" in zf.namelist():
            stored = _read_entry(zf, "md5checksum.hex", p, 4096).decode("ascii", "replace").split()
            if not stored or stored[0].lower() != hashlib.md5(xml).hexdigest():
                raise FormatError(p, "main.xml does not match its MD5 checksum (md5checksum.hex)")
        try:
            root = SafeET.fromstring(xml, forbid_dtd=True)
        except DefusedXmlException as exc:
            raise FormatError(
                p, f"main.xml is refused: {type(exc).__name__} (entities and DTDs are not allowed)"
            ) from None
        except (SafeET.ParseError, LookupError, ValueError) as exc:  # LookupError: unknown encoding
            raise FormatError(p, f"main.xml is not well-formed XML ({exc})") from None
        if root.tag not in (f"{_NS}ISO5436_2", "ISO5436_2"):
            raise FormatError(p, f"main.xml root is {root.tag!r}, not ISO5436_2")
        feature = _text(root, "Record1/FeatureType", p)
        if feature != "SUR":
            raise FormatError(p, f"feature type {feature!r}: only surfaces (SUR) are height maps")
        for axis in ("CX", "CY"):
            if _text(root, f"Record1/Axes/{axis}/AxisType", p) != "I":
                raise FormatError(
                    p,
                    f"axis {axis} is not incremental (AxisType I); explicit coordinates are not supported",
                )
        dx = _float(root, "Record1/Axes/CX/Increment", p)
        dy = _float(root, "Record1/Axes/CY/Increment", p)
        if not (dx > 0 and dy > 0) or not np.isfinite([dx, dy]).all():
            raise FormatError(p, f"axis increments must be positive, got CX {dx}, CY {dy}")
        if abs(dx - dy) > 1e-9 * max(dx, dy):
            raise FormatError(p, f"non-square pixels (CX {dx} m, CY {dy} m) are not supported")
        dtype_code = _text(root, "Record1/Axes/CZ/DataType", p)
        if dtype_code not in _DTYPES:
            raise FormatError(p, f"unknown CZ data type {dtype_code!r}")
        z_inc = _float(root, "Record1/Axes/CZ/Increment", p, default=1.0)
        z_off = _float(root, "Record1/Axes/CZ/Offset", p, default=0.0)
        try:
            nx = int(_required(root, "Record3/MatrixDimension/SizeX", p))
            ny = int(_required(root, "Record3/MatrixDimension/SizeY", p))
            nz = int(_required(root, "Record3/MatrixDimension/SizeZ", p))
        except ValueError:
            raise FormatError(p, "matrix dimensions are not integers") from None
        if nz != 1:
            raise FormatError(p, f"{nz} layers: only single-layer surfaces are supported")
        check_pixels(p, ny, nx, what="the matrix")
        link = _required(root, "Record3/DataLink/PointDataLink", p)
        dt = _DTYPES[dtype_code]
        raw = _read_entry(zf, link, p, nx * ny * dt.itemsize)
        if len(raw) != nx * ny * dt.itemsize:
            raise FormatError(
                p,
                f"{link} holds {len(raw)} bytes, expected {nx * ny * dt.itemsize} for {nx} x {ny} {dtype_code}",
            )
        md5 = _text(root, "Record3/DataLink/MD5ChecksumPointData", p, required=False)
        if md5 and md5.lower() != hashlib.md5(raw).hexdigest():
            raise FormatError(p, f"{link} does not match its MD5 checksum")
        values = np.frombuffer(raw, dtype=dt).reshape(ny, nx).astype(np.float64)
        valid_link = _text(root, "Record3/DataLink/ValidPointsLink", p, required=False)
        if valid_link:
            vraw = _read_entry(zf, valid_link, p, (nx * ny + 7) // 8)
            vmd5 = _text(root, "Record3/DataLink/MD5ChecksumValidPoints", p, required=False)
            if vmd5 and vmd5.lower() != hashlib.md5(vraw).hexdigest():
                raise FormatError(p, f"{valid_link} does not match its MD5 checksum")
            if len(vraw) * 8 < nx * ny:
                raise FormatError(p, f"{valid_link} is too short for {nx * ny} points")
            bits = np.unpackbits(np.frombuffer(vraw, np.uint8), bitorder="little")[: nx * ny]
            values[~bits.reshape(ny, nx).astype(bool)] = np.nan
    height_nm = (values[::-1] * z_inc + z_off) * 1e9  # the file's y up the rows: row 0 on top
    meta = merge(p, {"dx_mm": dx * 1e3, "units": "nm"}, given)
    return build_map(p, height_nm, meta, source={"file": p.name, "format": "x3p"})


def write_x3p(path: str | Path, surface: SurfaceMap, *, compress: bool = True) -> None:
    """Write a map as a float64 X3P surface (metres, NaN for invalid points); ``compress=False``
    stores the zip entries uncompressed (faster, for transient files)."""
    Path(path).write_bytes(x3p_bytes(surface, compress=compress))


def x3p_bytes(surface: SurfaceMap, *, compress: bool = True) -> bytes:
    """The X3P file of a map, as bytes (see :func:`write_x3p`)."""
    data = (surface.height_nm[::-1] * 1e-9).astype("<f8").tobytes()  # y increasing per row
    inc = surface.dx_mm * 1e-3
    ny, nx = surface.shape
    xml = f"""<?xml version="1.0" encoding="UTF-8"?>
<p:ISO5436_2 xmlns:p="http://www.opengps.eu/2008/ISO5436_2">
  <Record1>
    <Revision>ISO5436 - 2000</Revision>
    <FeatureType>SUR</FeatureType>
    <Axes>
      <CX><AxisType>I</AxisType><DataType>D</DataType><Increment>{inc!r}</Increment><Offset>0.0</Offset></CX>
      <CY><AxisType>I</AxisType><DataType>D</DataType><Increment>{inc!r}</Increment><Offset>0.0</Offset></CY>
      <CZ><AxisType>A</AxisType><DataType>D</DataType><Increment>1.0</Increment><Offset>0.0</Offset></CZ>
    </Axes>
  </Record1>
  <Record2>
    <Date>{escape(str(surface.source.get("measured_at", "1970-01-01T00:00:00+00:00")))}</Date>
    <Instrument><Manufacturer>shopdb</Manufacturer><Model>export</Model><Serial></Serial><Version>1</Version></Instrument>
    <ProbingSystem><Type>NonContacting</Type><Identification>interferometer</Identification></ProbingSystem>
    <Comment>{escape(f"wavelength_nm={surface.wavelength_nm!r} kind={surface.kind}")}</Comment>
  </Record2>
  <Record3>
    <MatrixDimension><SizeX>{nx}</SizeX><SizeY>{ny}</SizeY><SizeZ>1</SizeZ></MatrixDimension>
    <DataLink>
      <PointDataLink>bindata/data.bin</PointDataLink>
      <MD5ChecksumPointData>{hashlib.md5(data).hexdigest()}</MD5ChecksumPointData>
    </DataLink>
  </Record3>
  <Record4><ChecksumFile>md5checksum.hex</ChecksumFile></Record4>
</p:ISO5436_2>
""".encode()
    buf = io.BytesIO()
    method = zipfile.ZIP_DEFLATED if compress else zipfile.ZIP_STORED
    with zipfile.ZipFile(buf, "w", compression=method, compresslevel=1 if compress else None) as zf:
        zf.writestr("main.xml", xml)
        zf.writestr("md5checksum.hex", f"{hashlib.md5(xml).hexdigest()} *main.xml\n")
        zf.writestr("bindata/data.bin", data)
    return buf.getvalue()
