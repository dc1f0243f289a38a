"""Generates the bad-input corpus of tests/data/bad/ (not committed: made on demand)."""

from __future__ import annotations

import hashlib
import io
import zipfile
from pathlib import Path

import numpy as np

from shopdb.formats import write_map
from shopdb.seed_demo.factories import disk_map


def _x3p_bytes(
    xml: bytes, data: bytes, *, md5_xml: str | None = None, extra: dict | None = None
) -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("main.xml", xml)
        zf.writestr("md5checksum.hex", f"{md5_xml or hashlib.md5(xml).hexdigest()} *main.xml\n")
        zf.writestr("bindata/data.bin", data)
        for k, v in (extra or {}).items():
            zf.writestr(k, v)
    return buf.getvalue()


def _declare_size(archive: bytes, name: str, size: int) -> bytes:
    """A zip whose central directory claims ``size`` uncompressed bytes for ``name`` (a zip bomb's
    signature, without building one)."""
    buf = bytearray(archive)
    i = buf.find(b"PK\x01\x02" + b"")
    while i >= 0:
        name_len = int.from_bytes(buf[i + 28 : i + 30], "little")
        if bytes(buf[i + 46 : i + 46 + name_len]) == name.encode():
            buf[i + 24 : i + 28] = size.to_bytes(4, "little")
            return bytes(buf)
        i = buf.find(b"PK\x01\x02", i + 4)
    raise ValueError(f"{name} not in archive")


def make_corpus(folder: Path) -> dict[str, str]:
    """Write each bad file; returns {file name: expected message fragment}."""
    folder.mkdir(parents=True, exist_ok=True)
    good = disk_map({(2, 0): 20.0}, npix=32)
    write_map(folder / "good.x3p", good)
    raw = (folder / "good.x3p").read_bytes()
    zf = zipfile.ZipFile(io.BytesIO(raw))
    xml, data = zf.read("main.xml"), zf.read("bindata/data.bin")
    cases: dict[str, tuple[bytes, str]] = {}
    cases["truncated.x3p"] = (raw[: len(raw) // 2], "not a readable zip")
    cases["wrong_checksum.x3p"] = (
        _x3p_bytes(xml, data, md5_xml="0" * 32),
        "does not match its MD5",
    )
    bomb = b'<?xml version="1.0"?><!DOCTYPE l [<!ENTITY a "aaaaaaaaaa"><!ENTITY b "&a;&a;&a;&a;&a;&a;">]><l>&b;</l>'
    cases["entity_expansion.x3p"] = (_x3p_bytes(bomb, data), "entities and DTDs are not allowed")
    xxe = b'<?xml version="1.0"?><!DOCTYPE r [<!ENTITY x SYSTEM "file:///etc/passwd">]><r>&x;</r>'
    cases["external_entity.x3p"] = (_x3p_bytes(xxe, data), "entities and DTDs are not allowed")
    cases["oversized_entry.x3p"] = (
        _declare_size(_x3p_bytes(xml, data), "bindata/data.bin", 0xFFFF0000),
        "expands to",
    )
    cases["wrong_length.x3p"] = (
        _x3p_bytes(xml.replace(hashlib.md5(data).hexdigest().encode(), b""), data[:-8]),
        "expected 8192 for 32 x 32 D",
    )
    for name, (content, _) in cases.items():
        (folder / name).write_bytes(content)
    np.save(folder / "all_nan.npy", np.full((16, 16), np.nan))
    np.save(folder / "one_row.npy", np.ones((1, 40)))
    (folder / "infinite_pitch.csv").write_text(
        "# dx_mm: inf\n# units: nm\n# wavelength_nm: 632.8\n1,2\n3,4\n"
    )
    (folder / "negative_pitch.csv").write_text(
        "# dx_mm: -0.1\n# units: nm\n# wavelength_nm: 632.8\n1,2\n3,4\n"
    )
    (folder / "unknown_units.csv").write_text(
        "# dx_mm: 0.1\n# units: furlongs\n# wavelength_nm: 632.8\n1,2\n3,4\n"
    )
    (folder / "ragged.csv").write_text(
        "# dx_mm: 0.1\n# units: nm\n# wavelength_nm: 632.8\n1,2,3\n4,5\n"
    )
    (folder / "non_numeric.csv").write_text(
        "# dx_mm: 0.1\n# units: nm\n# wavelength_nm: 632.8\n1,2\n3,abc\n"
    )
    # the exhaustion cases, each refused from its header before any allocation
    big_xml = xml.replace(b"<SizeX>32</SizeX>", b"<SizeX>8192</SizeX>").replace(
        b"<SizeY>32</SizeY>", b"<SizeY>8192</SizeY>"
    )
    (folder / "huge_matrix.x3p").write_bytes(_x3p_bytes(big_xml, data))
    (folder / "huge_header.npy").write_bytes(_npy_claiming((10**6, 10**6)))
    with zipfile.ZipFile(folder / "huge_header.npz", "w") as zf:
        zf.writestr("height.npy", _npy_claiming((10**6, 10**6)))
    with zipfile.ZipFile(folder / "object_array.npz", "w") as zf:
        buf = io.BytesIO()
        np.lib.format.write_array_header_1_0(
            buf, {"descr": "|O", "fortran_order": False, "shape": (2, 2)}
        )
        zf.writestr("height.npy", buf.getvalue() + b"\0" * 32)
    _hdf5_cases(folder)
    expected = {name: msg for name, (_, msg) in cases.items()}
    expected.update(
        {
            "huge_matrix.x3p": "over the limit of",
            "huge_header.npy": "over the limit of",
            "huge_header.npz": "over the limit of",
            "object_array.npz": "Python objects",
            "external_storage.h5": "outside the file",
            "external_link.h5": "ExternalLink",
            "soft_link.h5": "SoftLink",
            "virtual.h5": "outside the file",
        }
    )
    expected.update(
        {
            "all_nan.npy": "no valid pixels",
            "one_row.npy": "at least 2 x 2",
            "infinite_pitch.csv": "pixel pitch dx_mm must be a positive finite",
            "negative_pitch.csv": "pixel pitch dx_mm must be a positive finite",
            "unknown_units.csv": "unknown units 'furlongs'",
            "ragged.csv": "ragged rows",
            "non_numeric.csv": "'abc' is not a number",
        }
    )
    return expected


def _npy_claiming(shape: tuple[int, ...]) -> bytes:
    """A .npy header declaring ``shape`` of float64, followed by a few bytes only."""
    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(
        buf, {"descr": "<f8", "fortran_order": False, "shape": shape}
    )
    return buf.getvalue() + b"\0" * 64


def _hdf5_cases(folder: Path) -> None:
    """HDF5 files that would make h5py read outside them: external storage of a "secret" file,
    an external link, a soft link, a virtual dataset."""
    import h5py

    secret = folder / "secret.bin"
    secret.write_bytes(np.arange(16.0).tobytes())
    with h5py.File(folder / "external_storage.h5", "w") as f:
        f.create_dataset("height", shape=(4, 4), dtype="<f8", external=[(str(secret), 0, 128)])
        f["height"].attrs["dx_mm"] = 0.1
    with h5py.File(folder / "other.h5", "w") as f:
        f.create_dataset("height", data=np.ones((8, 8)))
    with h5py.File(folder / "external_link.h5", "w") as f:
        f["height"] = h5py.ExternalLink(str(folder / "other.h5"), "/height")
    with h5py.File(folder / "soft_link.h5", "w") as f:
        f.create_dataset("real", data=np.ones((8, 8)))
        f["height"] = h5py.SoftLink("/real")
    layout = h5py.VirtualLayout(shape=(8, 8), dtype="f8")
    layout[:] = h5py.VirtualSource(str(folder / "other.h5"), "height", shape=(8, 8))
    with h5py.File(folder / "virtual.h5", "w") as f:
        f.create_virtual_dataset("height", layout)
