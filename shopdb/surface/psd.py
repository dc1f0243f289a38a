"""Power spectral density and band-limited RMS of height maps.

Notes
-----
Two-sided 2-D PSD of a map z on an Nr x Nc grid of pitch dx (mm), with window w:

    PSD(fy, fx) = dx^2 / (Nr Nc) * |DFT(z w)|^2 / mean(w^2)        [nm^2 mm^2]

on frequencies fx = k / (Nc dx), fy = l / (Nr dx) (cycles/mm). Dividing by mean(w^2) is the
window-energy correction for a noise-like signal (Heinzel, Rudiger & Schilling, "Spectrum and
spectral density estimation by the DFT", MPI report, 2002, §9-10); with it Parseval reads

    sum PSD * dfx * dfy = sum (z w)^2 / sum w^2,

the window-weighted mean square of z. Missing pixels and pixels outside the aperture carry
w = 0, so a circular or annular aperture is handled as an apodised aperture with energy
normalisation: the window is the aperture mask times a Hann taper (radial cos^2 for circular
and annular apertures, separable for rectangles, or none). Band RMS is the square root of the
PSD summed over f1 <= |f| < f2 (times dfx dfy).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import scipy.fft
import scipy.sparse

from shopdb.surface.settings import PSD_WINDOWS as WINDOWS


def window(
    mask: np.ndarray,
    *,
    kind: str = "hann",
    centre_rc=None,
    radius_px=None,
    obscuration: float = 0.0,
) -> np.ndarray:
    """Window over a masked grid: the mask times a Hann taper (or the bare mask).

    Circular apertures get the radial taper cos^2(pi rho / 2); annular ones sin^2 across the
    annulus, zero at both edges, so neither edge leaks figure error into the high bands.

    Notes
    -----
    Window shapes and their energy correction after Heinzel, Rüdiger & Schilling, MPI report
    "Spectrum and spectral density estimation by the DFT" (2002).
    """
    if kind not in WINDOWS:
        raise ValueError(f"PSD window {kind!r} is not one of {', '.join(WINDOWS)}")
    w = mask.astype(np.float64)
    if kind == "none":
        return w
    ny, nx = mask.shape
    if centre_rc is not None and radius_px is not None:
        rows, cols = np.ogrid[:ny, :nx]
        rho = np.hypot(rows - centre_rc[0], cols - centre_rc[1]) / radius_px
        if obscuration > 0:
            u = np.clip((rho - obscuration) / (1 - obscuration), 0, 1)
            return w * np.sin(np.pi * u) ** 2
        return w * radial_taper(rho)
    return w * np.outer(np.hanning(ny + 2)[1:-1], np.hanning(nx + 2)[1:-1])


def radial_taper(rho: np.ndarray) -> np.ndarray:
    """The circular Hann taper cos^2(pi rho / 2) inside rho < 1, zero outside.

    Notes
    -----
    A radial Tukey (cosine-tapered) window over the circular aperture (Heinzel et al. 2002,
    for the energy correction).
    """
    return np.where(rho < 1, np.cos(np.pi * np.minimum(rho, 1) / 2) ** 2, 0.0)


def psd2d(
    height_nm: np.ndarray, dx_mm: float, *, w: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Two-sided 2-D PSD (nm^2 mm^2) and its frequency axes fy, fx (cycles/mm, fft order).

    NaN heights are treated as missing (window 0). ``w`` defaults to the valid-pixel mask.

    Notes
    -----
    PSD(fx, fy) = dx dy / (Nx Ny) |DFT(z w)|^2 / mean(w^2), so that Parseval holds:
    sigma^2 = sum PSD dfx dfy (Heinzel et al. 2002; shared/REFERENCES.md).
    """
    z = np.asarray(height_nm, dtype=np.float64)
    valid = np.isfinite(z)
    if w is None:
        w = valid.astype(np.float64)
    w = np.where(valid, w, 0.0)
    energy = float(np.mean(w * w))
    if energy == 0:
        raise ValueError("the PSD window has no weight: no valid pixels")
    zw = np.where(valid, z, 0.0) * w
    ny, nx = z.shape
    spec = scipy.fft.fft2(zw, workers=-1)
    psd = (dx_mm * dx_mm / (ny * nx)) * (spec.real**2 + spec.imag**2) / energy
    return psd, scipy.fft.fftfreq(ny, dx_mm), scipy.fft.fftfreq(nx, dx_mm)


@lru_cache(maxsize=16)
def _radius_grid(shape: tuple[int, int], dx_mm: float) -> np.ndarray:
    fy = scipy.fft.fftfreq(shape[0], dx_mm)
    fx = scipy.fft.rfftfreq(shape[1], dx_mm)
    f = np.hypot(fy[:, None], fx[None, :])
    f.setflags(write=False)
    return f


def fast_shape(shape: tuple[int, int]) -> tuple[int, int]:
    """The grid zero-padded to lengths the FFT factors well (a 1025-point transform is 5x slower).

    Notes
    -----
    scipy.fft.next_fast_len: sizes of small prime factors make the FFT fast.
    """
    return (
        scipy.fft.next_fast_len(shape[0], real=True),
        scipy.fft.next_fast_len(shape[1], real=True),
    )


@dataclass(frozen=True)
class Band:
    """The RMS of one PSD band.

    Notes
    -----
    Band edges in cycles/mm; the common split of high-power-laser optics (J. Eur. Opt. Soc.
    Rapid Publ. 2017, after Aikens, Wolfe & Lawson, SPIE 2576, 1995).
    """

    low_per_mm: float
    high_per_mm: float  # may be inf
    rms_nm: float
    resolved: bool  # False if the band lies wholly outside the map's frequency range

    def as_dict(self) -> dict:
        return {
            "low_per_mm": self.low_per_mm,
            "high_per_mm": None if math.isinf(self.high_per_mm) else self.high_per_mm,
            "rms_nm": self.rms_nm,
        }


def bands_from_periods(periods_mm: tuple[float, ...]) -> tuple[float, ...]:
    """Band edges in cycles/mm from period edges in mm (largest period first): 1/period, with 0 and inf added.

    Notes
    -----
    Spatial frequency is the reciprocal of the period (cycles/mm = 1 / mm).
    """
    if any(p <= 0 for p in periods_mm):
        raise ValueError("band periods must be positive mm values")
    return (0.0, *sorted(1.0 / p for p in periods_mm), math.inf)


@lru_cache(maxsize=16)
def _band_matrix(
    shape: tuple[int, int], dx_mm: float, edges: tuple[float, ...]
) -> tuple[scipy.sparse.csr_matrix, float]:
    """Sparse (bands x half-plane bins) matrix summing |DFT|^2 into band variances, and the
    largest frequency on the grid.

    Columns 1 .. (nx-1)//2 of the half plane stand for their mirror images too (weight 2), so the
    half-plane sums equal the full plane's. With PSD = dx^2 / (ny nx) |DFT|^2 / mean(w^2) and
    df^2 = 1 / (ny dx nx dx), a band's variance is sum |DFT|^2 / (ny nx)^2 / mean(w^2): the
    weights carry 1 / (ny nx)^2.
    """
    ny, nx = shape
    f = _radius_grid(shape, dx_mm)
    band2d = np.searchsorted(np.asarray(edges), f, side="right") - 1  # -1: below the first edge
    weight2d = np.full(f.shape, 1.0 / float(ny * nx) ** 2)
    last = nx // 2 if nx % 2 == 0 else nx // 2 + 1
    weight2d[:, 1:last] *= 2.0
    band, weight = band2d.ravel(), weight2d.ravel()
    inside = (band >= 0) & (band < len(edges) - 1)
    cols = np.flatnonzero(inside)
    m = scipy.sparse.csr_matrix((weight[cols], (band[cols], cols)), shape=(len(edges) - 1, f.size))
    return m, float(f.max())


def bands_of_weighted(
    zw: np.ndarray,
    dx_mm: float,
    energy: float,
    edges: tuple[float, ...],
    map_shape: tuple[int, int],
) -> list[Band]:
    """Band RMS from the windowed map ``zw`` already zero-padded to :func:`fast_shape`;
    ``energy`` is mean(w^2) over the padded grid (so Parseval holds), ``map_shape`` the unpadded
    size (it sets the lowest frequency the map resolves).

    Notes
    -----
    Band RMS = sqrt of the PSD summed over f1 <= |f| < f2 times the frequency cell (Parseval;
    Heinzel et al. 2002).
    """
    if energy <= 0:
        raise ValueError("the PSD window has no weight: no valid pixels")
    spec = scipy.fft.rfft2(zw, workers=-1)
    power = spec.real**2 + spec.imag**2
    m, fmax = _band_matrix(zw.shape, float(dx_mm), tuple(edges))
    sums = (m @ power.ravel()) / energy
    fmin = 1.0 / (max(map_shape) * dx_mm)  # lowest frequency the (unpadded) map resolves
    out = []
    for i in range(len(edges) - 1):
        lo, hi = float(edges[i]), float(edges[i + 1])
        resolved = lo <= fmax and (hi > fmin or lo == 0)
        out.append(Band(lo, hi, math.sqrt(max(sums[i], 0.0)), resolved=resolved))
    return out


def band_rms(
    height_nm: np.ndarray,
    dx_mm: float,
    edges_per_mm: tuple[float, ...],
    *,
    w: np.ndarray | None = None,
) -> list[Band]:
    """RMS in each band [edges[i], edges[i+1]) of spatial frequency |f| (cycles/mm).

    A complete partition (edges from 0 to inf) sums, in variance, to the window-weighted mean
    square of the map (Parseval; see the module notes).

    Notes
    -----
    Band RMS by Parseval over the windowed map (Heinzel et al. 2002); a cosine of amplitude A
    with whole periods gives A / sqrt(2) in its band (shared/REFERENCES.md).
    """
    edges = np.asarray(edges_per_mm, dtype=float)
    if edges.ndim != 1 or edges.size < 2 or np.any(np.diff(edges) <= 0) or edges[0] < 0:
        raise ValueError(f"PSD band edges must increase from >= 0, got {list(edges_per_mm)}")
    z = np.asarray(height_nm, dtype=np.float64)
    valid = np.isfinite(z)
    w = valid.astype(np.float64) if w is None else np.where(valid, w, 0.0)
    shape = fast_shape(z.shape)
    zw = np.zeros(shape)
    zw[: z.shape[0], : z.shape[1]] = np.where(valid, z, 0.0) * w
    energy = float(np.sum(w * w)) / (shape[0] * shape[1])
    return bands_of_weighted(zw, dx_mm, energy, tuple(edges.tolist()), z.shape)


def radial_psd(
    height_nm: np.ndarray, dx_mm: float, *, w: np.ndarray | None = None, bins: int | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Azimuthally averaged 2-D PSD as a function of |f|: (f cycles/mm, PSD nm^2 mm^2).

    Bins of width 1/(N dx) (N the larger side) from 0 to the Nyquist frequency. For an
    isotropic surface this is the 2-D PSD along any direction; integrate it as
    2 pi f PSD(f) df for the variance.

    Notes
    -----
    The 2-D PSD averaged over annuli of |f| (common practice for isotropic surfaces;
    ISO 10110-8:2019 uses such profiles for roughness and waviness).
    """
    psd, fy, fx = psd2d(height_nm, dx_mm, w=w)
    f = np.hypot(fy[:, None], fx[None, :])
    n = max(height_nm.shape)
    df = 1.0 / (n * dx_mm)
    nyq = 0.5 / dx_mm
    nb = bins or int(nyq / df)
    idx = np.floor(f / df + 0.5).astype(int)
    keep = idx < nb
    sums = np.bincount(idx[keep], weights=psd[keep], minlength=nb)
    counts = np.bincount(idx[keep], minlength=nb)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = sums / counts
    good = counts > 0
    return (np.arange(nb) * df)[good], mean[good]
