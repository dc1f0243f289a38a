"""Format round trips, the X3P cross-check against an independent library, bad files, fuzzing."""

from __future__ import annotations

import contextlib
import io
import zipfile

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from shopdb.formats import FormatError, Metadata, read_map, write_map
from shopdb.formats.x3p import read_x3p
from shopdb.seed_demo.factories import disk_map

from .bad_corpus import make_corpus

RNG = np.random.default_rng(11)


@pytest.mark.parametrize("suffix", [".x3p", ".npz", ".csv", ".h5", ".tif"])
def test_round_trip(tmp_path, suffix):
    m = disk_map({(2, 0): 25.0, (3, 1): -4.0}, npix=40, noise_nm=0.3, rng=RNG)
    write_map(tmp_path / f"m{suffix}", m)
    back = read_map(tmp_path / f"m{suffix}", metadata=Metadata(wavelength_nm=m.wavelength_nm))
    expect = (
        m.height_nm.astype(np.float32) if suffix == ".tif" else m.height_nm
    )  # TIFF is 32-bit float
    np.testing.assert_allclose(back.height_nm, expect, rtol=1e-12, atol=1e-9)
    assert back.dx_mm == pytest.approx(m.dx_mm, rel=1e-12)
    assert back.wavelength_nm == m.wavelength_nm and back.kind == "surface"


def test_x3p_written_by_an_independent_library_reads_back_identically(tmp_path):
    """Reference implementation: x3pio (PyPI), float64 and int16 storage with a valid-points mask.
    x3pio's rows run along +y (y increases with the row index, its docs); shopdb's maps have +y
    towards row 0, so the rows come back in reverse order."""
    x3pio = pytest.importorskip("x3pio")
    z_m = RNG.normal(0, 50e-9, (30, 41))
    z_m[3, 7] = z_m[10, 40] = np.nan
    x3pio.write(tmp_path / "f.x3p", z_m, x_scale=2.5e-4, y_scale=2.5e-4)
    got = read_x3p(tmp_path / "f.x3p", Metadata(wavelength_nm=632.8))
    np.testing.assert_array_equal(np.isnan(got.height_nm), np.isnan(z_m[::-1]))
    np.testing.assert_allclose(got.height_nm, z_m[::-1] * 1e9, rtol=1e-12)
    assert got.dx_mm == pytest.approx(0.25)
    x3pio.write(
        tmp_path / "i.x3p", z_m, x_scale=2.5e-4, y_scale=2.5e-4, z_type=x3pio.DataType.INT16
    )
    ref = x3pio.read(tmp_path / "i.x3p").layers[0].z  # their own decoding of the integer file
    got = read_x3p(tmp_path / "i.x3p", Metadata(wavelength_nm=632.8))
    np.testing.assert_allclose(
        got.height_nm, np.asarray(ref)[::-1] * 1e9, rtol=1e-12, equal_nan=True
    )
    # and the other way: x3pio reads what we write, in its own row order
    write_map(tmp_path / "ours.x3p", got)
    np.testing.assert_allclose(
        np.asarray(x3pio.read(tmp_path / "ours.x3p").layers[0].z)[::-1] * 1e9,
        got.height_nm,
        rtol=1e-12,
        equal_nan=True,
    )


@pytest.mark.parametrize("m_sin", [-1, -2, -3])
def test_sin_terms_keep_their_sign_from_an_x3p_written_by_x3pio(tmp_path, m_sin):
    """A surface high towards +y, written by x3pio in its own axes (x along columns, y increasing
    with the row index: ISO 25178-72 incremental axes), reads with a positive sin coefficient:
    coma y Z(3,-1), astigmatism 45 Z(2,-2) and trefoil y Z(3,-3) in the convention of
    shopdb.surface.orient (+x along columns, +y up the map). Coefficients: orthonormal ANSI
    Z80.28 / ISO 24157 terms of 10 nm RMS."""
    x3pio = pytest.importorskip("x3pio")
    from shopdb.surface import zernike
    from shopdb.surface.analysis import analyze
    from shopdb.surface.settings import AnalysisSettings

    n = {-1: 3, -2: 2, -3: 3}[m_sin]
    npix, dx = 129, 1e-3  # 1 mm pixels
    row, col = np.mgrid[:npix, :npix]
    x = (col - 64) / 60.0
    y = (row - 64) / 60.0  # x3pio: y increases with the row index
    rho, theta = np.hypot(x, y), np.arctan2(y, x)
    z = np.where(rho <= 1, 10e-9 * zernike.zernike(n, m_sin, rho, theta), np.nan)
    x3pio.write(tmp_path / "z.x3p", z, x_scale=dx, y_scale=dx)
    got = read_x3p(tmp_path / "z.x3p", Metadata(wavelength_nm=632.8))
    a = analyze(got, AnalysisSettings(remove=("piston",), zernike_order=4))
    assert a.coefficient(n, m_sin) == pytest.approx(10.0, rel=2e-3)


def test_conflicting_metadata_is_an_error(tmp_path):
    m = disk_map({(2, 0): 5.0}, npix=16)
    write_map(tmp_path / "m.npz", m)
    with pytest.raises(FormatError, match=r"dx_mm is .* in the file but 0.5 was given"):
        read_map(tmp_path / "m.npz", metadata=Metadata(dx_mm=0.5))


def test_text_grid_sniffing_sentinel_and_header(tmp_path):
    (tmp_path / "g.txt").write_text(
        "dx_mm: 0.2\nunits: um\nwavelength_nm: 632.8\nno_data: -9999\n1.0\t2.0\t-9999\n\t4.0\t5.0\n"
    )
    m = read_map(tmp_path / "g.txt")
    np.testing.assert_array_equal(m.height_nm, [[1000, 2000, np.nan], [np.nan, 4000, 5000]])
    (tmp_path / "s.csv").write_text("1;2\n3;NaN\n")
    m = read_map(tmp_path / "s.csv", metadata=Metadata(dx_mm=1, units="nm", wavelength_nm=600))
    assert np.isnan(m.height_nm[1, 1]) and m.height_nm[0, 1] == 2


def test_bad_corpus_each_gives_its_message(tmp_path):
    expected = make_corpus(tmp_path)
    for name, message in expected.items():
        with pytest.raises((FormatError, ValueError)) as info:
            m = read_map(
                tmp_path / name,
                metadata=Metadata(
                    wavelength_nm=632.8, dx_mm=None if name.endswith((".csv", ".x3p")) else 0.1
                ),
            )
            from shopdb.surface.analysis import analyze

            analyze(m)
        assert message in str(info.value), (name, str(info.value))


_GOOD = None


def _good_x3p() -> bytes:
    global _GOOD
    if _GOOD is None:
        buf = io.BytesIO()
        import tempfile
        from pathlib import Path

        with tempfile.TemporaryDirectory() as d:
            write_map(Path(d) / "g.x3p", disk_map({(2, 0): 10.0}, npix=12))
            _GOOD = (Path(d) / "g.x3p").read_bytes()
        del buf
    return _GOOD


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(data=st.data())
def test_fuzz_x3p_only_format_errors_escape(tmp_path, data):
    """Mutated X3P archives (bytes flipped in the zip, or in main.xml before re-zipping): the reader
    either returns a map or raises FormatError — never anything else."""
    raw = bytearray(_good_x3p())
    if data.draw(st.booleans()):
        for _ in range(data.draw(st.integers(1, 8))):
            i = data.draw(st.integers(0, len(raw) - 1))
            raw[i] = data.draw(st.integers(0, 255))
        blob = bytes(raw)
    else:
        zf = zipfile.ZipFile(io.BytesIO(bytes(raw)))
        xml = bytearray(zf.read("main.xml"))
        for _ in range(data.draw(st.integers(1, 6))):
            i = data.draw(st.integers(0, len(xml) - 1))
            xml[i] = data.draw(st.sampled_from(list(b"<>&;0123456789.-eE ")))
        out = io.BytesIO()
        with zipfile.ZipFile(out, "w") as z2:
            import hashlib

            z2.writestr("main.xml", bytes(xml))
            z2.writestr("md5checksum.hex", hashlib.md5(bytes(xml)).hexdigest() + " *main.xml\n")
            z2.writestr("bindata/data.bin", zf.read("bindata/data.bin"))
        blob = out.getvalue()
    path = tmp_path / "fuzz.x3p"
    path.write_bytes(blob)
    with contextlib.suppress(FormatError):
        read_x3p(path, Metadata(wavelength_nm=632.8))


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(text=st.text(alphabet=st.sampled_from(list("0123456789.,;\t -+eEnaNx:#\n")), max_size=300))
def test_fuzz_text_grid_only_format_errors_escape(tmp_path, text):
    path = tmp_path / "fuzz.csv"
    path.write_text(text)
    with contextlib.suppress(FormatError):
        read_map(path, metadata=Metadata(dx_mm=0.1, units="nm", wavelength_nm=632.8))


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(data=st.data())
def test_fuzz_npz_only_format_errors_escape(tmp_path, data):
    """Mutated .npz archives: a map or a FormatError, never another exception."""
    good = tmp_path / "good.npz"
    write_map(good, disk_map({(2, 0): 10.0}, npix=12))
    raw = bytearray(good.read_bytes())
    for _ in range(data.draw(st.integers(1, 8))):
        raw[data.draw(st.integers(0, len(raw) - 1))] = data.draw(st.integers(0, 255))
    path = tmp_path / "fuzz.npz"
    path.write_bytes(bytes(raw))
    with contextlib.suppress(FormatError):
        read_map(path, metadata=Metadata(wavelength_nm=632.8))
