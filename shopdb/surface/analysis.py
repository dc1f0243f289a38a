"""``analyze(map, settings) -> SurfaceResult``: the one entry point the services call.

Pipeline: resolve the clear aperture -> least-squares Zernike fit on the valid pixels ->
PV/RMS after the removed terms -> PVr -> ISO 10110-5 quantities -> slopes -> PSD bands.

Speed: everything that depends only on the grid and aperture — the basis matrix B (terms x
aperture pixels) and its Gram matrix G = B B^T — is cached. A station's maps share a grid but
differ in dropouts; for the valid pixels the normal matrix is G minus the dropouts' outer
products (a low-rank downdate, cost terms^2 x dropouts), so a new map costs one streaming pass
B z for the right-hand side, a small Cholesky solve, and a partial pass for the PVr fit.

Notes
-----
ISO 10110-5 (ISO 10110-5:2015 §4; quantities defined in ISO 14999-4:2015 §3) over the clear
aperture, all from least-squares fits on the valid pixels:

- sagitta (power) deviation ``sag_nm``: the best-fit sphere (paraxially, piston + tilt +
  defocus) expressed as its height at the aperture edge minus at the centre, 2 sqrt(3) c(2,0)
  for the orthonormal defocus coefficient of that fit; signed (positive: edge higher).
- irregularity ``irregularity_nm``: PV of the surface after the best-fit sphere is removed.
- rotationally symmetric irregularity ``rsi_nm``: PV over the aperture radius of the
  rotationally symmetric part of the irregularity, i.e. of the m = 0, n >= 4 terms of the fit.
- ``rmst_nm``: RMS after piston and tilt; ``rmsi_nm``: RMS of the irregularity;
  ``rmsa_nm``: RMS of the irregularity without its rotationally symmetric part.

Fringes: one fringe of a double-pass test is lambda/2 of surface (lambda of wavefront).
On an annular or rectangular aperture the (circle) Zernike terms are not orthogonal: the fit
is still a plain least-squares fit, but coefficients depend on which terms are fitted;
``zernike_basis="annular"`` uses Mahajan's annular polynomials, orthonormal on the annulus.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import math
from collections import OrderedDict
from dataclasses import asdict, dataclass, field

import numpy as np
import scipy.linalg

from shopdb.surface import aperture, metrics, psd, zernike
from shopdb.surface.maps import SurfaceMap

SOFTWARE_VERSION = "0.1.0"
REMOVABLE = ("piston", "tilt", "power")
_REMOVE_TERMS = {"piston": [(0, 0)], "tilt": [(1, -1), (1, 1)], "power": [(2, 0)]}
# Band split common in high-power-laser optics (form > 33 mm period, mid-spatial 33-0.12 mm,
# roughness below 0.12 mm); J. Eur. Opt. Soc.-Rapid Publ. 2017, after Aikens, Wolfe & Lawson,
# SPIE 2576 (1995). Shops set their own bands per drawing.
DEFAULT_BAND_EDGES = (0.0, 1 / 33, 1 / 0.12, math.inf)
BASIS_FLOAT64_BUDGET = 768 * 2**20  # bytes; larger bases are cached in float32


@dataclass(frozen=True)
class AnalysisSettings:
    """How a map is analysed. Frozen and hashable; its :attr:`digest` is stored with results."""

    aperture: str = "circular"
    clear_aperture_fraction: float | None = None
    clear_aperture_mm: float | None = None
    obscuration_fraction: float = 0.0
    obscuration_mm: float | None = None
    edge_exclusion_mm: float = 0.0
    rect_size_mm: tuple[float, float] | None = None
    remove: tuple[str, ...] = ("piston", "tilt")
    zernike_order: int = 10
    zernike_basis: str = "circle"
    pvr_order: int | None = None  # None: min(7, zernike_order) — 36 terms at order 7
    psd_band_edges_per_mm: tuple[float, ...] = DEFAULT_BAND_EDGES
    psd_window: str = "hann"
    outlier_sigma: float | None = None

    def __post_init__(self) -> None:
        unknown = set(self.remove) - set(REMOVABLE)
        if unknown:
            raise ValueError(f"cannot remove {sorted(unknown)}: choose from {', '.join(REMOVABLE)}")
        object.__setattr__(self, "remove", tuple(t for t in REMOVABLE if t in self.remove))
        if not 1 <= self.zernike_order <= 30:
            raise ValueError(f"Zernike order must be 1..30, got {self.zernike_order}")
        if self.pvr_order is None:
            object.__setattr__(self, "pvr_order", min(7, self.zernike_order))
        if not 1 <= self.pvr_order <= self.zernike_order:
            raise ValueError(
                f"PVr order must be 1..zernike_order ({self.zernike_order}), got {self.pvr_order}"
            )
        if self.zernike_basis not in ("circle", "annular"):
            raise ValueError(f"Zernike basis {self.zernike_basis!r} is not 'circle' or 'annular'")
        if self.zernike_basis == "annular" and self.aperture != "annular":
            raise ValueError("annular Zernike polynomials need an annular aperture")
        if self.psd_window not in psd.WINDOWS:
            raise ValueError(
                f"PSD window {self.psd_window!r} is not one of {', '.join(psd.WINDOWS)}"
            )
        if self.outlier_sigma is not None and not self.outlier_sigma > 0:
            raise ValueError(f"outlier filter sigma must be > 0, got {self.outlier_sigma}")
        edges = tuple(float(e) for e in self.psd_band_edges_per_mm)
        if len(edges) < 2 or any(b <= a for a, b in itertools.pairwise(edges)) or edges[0] < 0:
            raise ValueError(f"PSD band edges must increase from >= 0, got {list(edges)}")
        object.__setattr__(self, "psd_band_edges_per_mm", edges)

    def as_dict(self) -> dict:
        d = asdict(self)
        d["psd_band_edges_per_mm"] = [
            None if math.isinf(e) else e for e in self.psd_band_edges_per_mm
        ]
        d["remove"] = list(self.remove)
        return d

    @classmethod
    def from_dict(cls, d: dict) -> AnalysisSettings:
        d = dict(d)
        if "psd_band_edges_per_mm" in d:
            d["psd_band_edges_per_mm"] = tuple(
                math.inf if e is None else e for e in d["psd_band_edges_per_mm"]
            )
        for k in ("remove", "rect_size_mm"):
            if d.get(k) is not None:
                d[k] = tuple(d[k])
        unknown = set(d) - set(cls.__dataclass_fields__)
        if unknown:
            raise ValueError(f"unknown analysis settings: {', '.join(sorted(unknown))}")
        return cls(**d)

    @property
    def digest(self) -> str:
        """SHA-256 of the canonical JSON of the settings."""
        text = json.dumps(self.as_dict(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode()).hexdigest()


@dataclass(frozen=True)
class SurfaceResult:
    pv_nm: float
    rms_nm: float
    pvr_nm: float
    pvr_terms: int
    zernike_nm: tuple[tuple[int, int, float], ...]  # (n, m, coef_nm) in ANSI order
    sag_nm: float
    irregularity_nm: float
    rsi_nm: float
    rmst_nm: float
    rmsi_nm: float
    rmsa_nm: float
    slope_rms_urad: float
    slope_max_urad: float
    psd_bands: tuple[psd.Band, ...]
    valid_fraction: float
    valid_pixels: int
    aperture_pixels: int
    aperture_centre_rc: tuple[float, float]
    aperture_radius_mm: float
    kind: str
    wavelength_nm: float
    settings_hash: str
    software_version: str = SOFTWARE_VERSION
    outliers_removed: int = 0
    settings: AnalysisSettings = field(default_factory=AnalysisSettings)

    @property
    def nm_per_fringe(self) -> float:
        return self.wavelength_nm / 2 if self.kind == "surface" else self.wavelength_nm

    def coefficient(self, n: int, m: int) -> float:
        for nn, mm, c in self.zernike_nm:
            if (nn, mm) == (n, m):
                return c
        raise KeyError(f"Z({n},{m}) was not fitted")

    def iso10110(self) -> dict[str, float]:
        return {
            "sag_nm": self.sag_nm,
            "irregularity_nm": self.irregularity_nm,
            "rsi_nm": self.rsi_nm,
            "rmst_nm": self.rmst_nm,
            "rmsi_nm": self.rmsi_nm,
            "rmsa_nm": self.rmsa_nm,
        }

    def as_dict(self) -> dict:
        """The stable JSON form (documented in the README)."""
        iso = self.iso10110()
        return {
            "pv_nm": self.pv_nm,
            "rms_nm": self.rms_nm,
            "pvr_nm": self.pvr_nm,
            "pvr_terms": self.pvr_terms,
            "zernike": [
                {
                    "n": n,
                    "m": m,
                    "ansi": zernike.nm_to_ansi(n, m),
                    "noll": zernike.nm_to_noll(n, m),
                    "name": zernike.name(n, m),
                    "coef_nm": c,
                }
                for n, m, c in self.zernike_nm
            ],
            "iso10110": iso,
            "iso10110_fringes": {
                k.replace("_nm", "_fr"): v / self.nm_per_fringe for k, v in iso.items()
            },
            "slope_rms_urad": self.slope_rms_urad,
            "slope_max_urad": self.slope_max_urad,
            "psd_bands": [b.as_dict() for b in self.psd_bands],
            "valid_fraction": self.valid_fraction,
            "kind": self.kind,
            "wavelength_nm": self.wavelength_nm,
            "aperture": {
                "centre_rc": list(self.aperture_centre_rc),
                "radius_mm": self.aperture_radius_mm,
                "pixels": self.aperture_pixels,
                "valid_pixels": self.valid_pixels,
            },
            "outliers_removed": self.outliers_removed,
            "settings": self.settings.as_dict(),
            "settings_hash": self.settings_hash,
            "software_version": self.software_version,
        }


# --- cached basis -------------------------------------------------------------------------


class _Basis:
    """Basis rows on the aperture pixels of one geometry, with its Gram matrix."""

    def __init__(self, geom: aperture.Geometry, terms: list[tuple[int, int]], kind: str) -> None:
        rho, theta = geom.polar()
        self.terms = terms
        self.index = {t: i for i, t in enumerate(terms)}
        n_pix = rho.size
        dtype = np.float64 if len(terms) * n_pix * 8 <= BASIS_FLOAT64_BUDGET else np.float32
        if kind == "annular":
            self.B = zernike.annular_basis(terms, rho, theta, geom.obscuration, dtype=dtype)
        else:
            self.B = zernike.basis(terms, rho, theta, dtype=dtype)
        self.G = self._gram(self.B)
        self.flat_index = np.flatnonzero(geom.mask)
        self.rho = rho

    @staticmethod
    def _gram(B: np.ndarray, chunk: int = 1 << 16) -> np.ndarray:
        G = np.zeros((B.shape[0], B.shape[0]))
        for s in range(0, B.shape[1], chunk):
            blk = B[:, s : s + chunk].astype(np.float64, copy=False)
            G += blk @ blk.T
        return G

    def rhs(self, z: np.ndarray, chunk: int = 1 << 13) -> np.ndarray:
        """B z with float64 accumulation (float32 bases are widened block by block)."""
        if self.B.dtype == np.float64:
            return self.B @ z
        out = np.zeros(self.B.shape[0])
        for s in range(0, self.B.shape[1], chunk):
            out += self.B[:, s : s + chunk].astype(np.float64) @ z[s : s + chunk]
        return out

    def synth(self, coefs: np.ndarray, rows: slice | list[int]) -> np.ndarray:
        return np.asarray(coefs, dtype=np.float64) @ self.B[rows]

    def normal_matrix(self, dropped: np.ndarray) -> np.ndarray:
        """Gram matrix over the aperture pixels minus ``dropped`` (indices into the aperture)."""
        if dropped.size == 0:
            return self.G
        if dropped.size * 2 < self.B.shape[1]:
            Bd = self.B[:, dropped].astype(np.float64)
            return self.G - Bd @ Bd.T
        keep = np.ones(self.B.shape[1], bool)
        keep[dropped] = False
        return self._gram(self.B[:, keep])


_CACHE: OrderedDict[tuple, _Basis] = OrderedDict()
CACHE_SIZE = 4


def _basis_for(geom: aperture.Geometry, terms: list[tuple[int, int]], kind: str) -> _Basis:
    key = (geom.key, tuple(terms), kind)
    hit = _CACHE.get(key)
    if hit is not None:
        _CACHE.move_to_end(key)
        return hit
    b = _Basis(geom, terms, kind)
    _CACHE[key] = b
    while len(_CACHE) > CACHE_SIZE:
        _CACHE.popitem(last=False)
    return b


def clear_cache() -> None:
    _CACHE.clear()


def _solve(G: np.ndarray, rhs: np.ndarray, what: str) -> np.ndarray:
    try:
        c, low = scipy.linalg.cho_factor(G, check_finite=False)
        return scipy.linalg.cho_solve((c, low), rhs, check_finite=False)
    except np.linalg.LinAlgError:
        raise ValueError(
            f"the valid pixels cannot determine {what}: too many dropouts for the requested terms"
        ) from None


# --- the analysis ---------------------------------------------------------------------------


def analyze(surface: SurfaceMap, settings: AnalysisSettings | None = None) -> SurfaceResult:
    """Analyse a height map; see the module notes for the definitions used.

    Examples
    --------
    >>> import numpy as np
    >>> from shopdb.surface.maps import SurfaceMap
    >>> y, x = np.mgrid[-1:1:129j, -1:1:129j]
    >>> m = SurfaceMap(np.where(x**2 + y**2 <= 1, 50 * (2 * (x**2 + y**2) - 1), np.nan), 0.5, 632.8)
    >>> r = analyze(m)
    >>> round(r.sag_nm, 1)
    100.0
    """
    settings = settings or AnalysisSettings()
    z_full = surface.height_nm
    valid_full = np.isfinite(z_full)
    geom = aperture.resolve(
        valid_full,
        surface.dx_mm,
        shape=settings.aperture,
        centre_rc=surface.centre_rc,
        radius_px=surface.radius_px,
        clear_aperture_fraction=settings.clear_aperture_fraction,
        clear_aperture_mm=settings.clear_aperture_mm,
        obscuration_fraction=settings.obscuration_fraction,
        obscuration_mm=settings.obscuration_mm,
        edge_exclusion_mm=settings.edge_exclusion_mm,
        rect_size_mm=settings.rect_size_mm,
    )
    terms = zernike.terms_up_to(settings.zernike_order)
    basis = _basis_for(
        geom, terms, settings.zernike_basis if settings.aperture == "annular" else "circle"
    )
    z_ap = z_full.ravel()[basis.flat_index]
    good = np.isfinite(z_ap)
    n_valid = int(good.sum())
    if n_valid < 3 * len(terms):
        raise ValueError(
            f"only {n_valid} valid pixels in the clear aperture: at least {3 * len(terms)} are needed "
            f"for {len(terms)} Zernike terms (order {settings.zernike_order})"
        )
    dropped = np.flatnonzero(~good)
    z0 = np.where(good, z_ap, 0.0)
    G = basis.normal_matrix(dropped)
    rhs = basis.rhs(z0)
    coefs = _solve(G, rhs, f"{len(terms)} Zernike terms")

    outliers = 0
    if settings.outlier_sigma is not None:
        resid = np.where(good, z0 - basis.synth(coefs, slice(None)), np.nan)
        med = np.nanmedian(resid)
        sigma = 1.4826 * np.nanmedian(np.abs(resid - med))  # MAD estimate of sigma
        spikes = np.flatnonzero(
            good & (np.abs(resid - med) > settings.outlier_sigma * max(sigma, 1e-12))
        )
        if spikes.size:
            outliers = int(spikes.size)
            Bs = basis.B[:, spikes].astype(np.float64)
            G = G - Bs @ Bs.T
            rhs = rhs - Bs @ z0[spikes]
            good[spikes] = False
            z0[spikes] = 0.0
            n_valid -= outliers
            coefs = _solve(G, rhs, f"{len(terms)} Zernike terms")

    zv = z0[good]

    def sub_fit(names: list[tuple[int, int]]) -> tuple[np.ndarray, np.ndarray]:
        """Least-squares fit of just these terms on the valid pixels; returns (coefs, surface)."""
        idx = [basis.index[t] for t in names]
        c = _solve(G[np.ix_(idx, idx)], rhs[idx], "the low-order terms")
        return c, basis.synth(c, idx)[good]

    removed = [t for name in settings.remove for t in _REMOVE_TERMS[name]]
    figure = zv - sub_fit(removed)[1] if removed else zv
    pt = [(0, 0), (1, -1), (1, 1)]
    total = zv - sub_fit(pt)[1]
    sphere_c, sphere = sub_fit([*pt, (2, 0)])
    irregular = zv - sphere

    # rotationally symmetric part of the irregularity: m = 0, n >= 4 terms of the fit
    rs_idx = [basis.index[(n, 0)] for n in range(4, settings.zernike_order + 1, 2)]
    if rs_idx:
        rs_pixels = basis.synth(coefs[rs_idx], rs_idx)[good]
        rho_line = np.linspace(geom.obscuration, 1.0, 2049)
        rs_line = sum(coefs[i] * zernike.zernike(*terms[i], rho_line, 0.0) for i in rs_idx)
        rsi = metrics.pv(rs_line)
    else:
        rs_pixels, rsi = 0.0, 0.0

    # PVr: PV of an order-pvr_order fit (removed terms left out) + 3 x RMS of its residual
    pvr_terms = zernike.terms_up_to(settings.pvr_order)
    k = len(pvr_terms)
    c_pvr = _solve(G[:k, :k], rhs[:k], f"{k} PVr terms")
    fit_pvr = basis.synth(c_pvr, slice(0, k))[good]
    removed_idx = [basis.index[t] for t in removed]
    fit_shown = fit_pvr - (
        basis.synth(c_pvr[removed_idx], removed_idx)[good] if removed_idx else 0.0
    )
    pvr = metrics.pv(fit_shown) + 3 * metrics.rms(zv - fit_pvr)

    # slopes and PSD of the figure map (removed terms subtracted) on the aperture's bounding box
    fig_map = np.full(z_full.size, np.nan)
    fig_map[basis.flat_index[good]] = figure
    fig_map = fig_map.reshape(z_full.shape)
    rows, cols = np.nonzero(geom.mask)
    box = (slice(rows.min(), rows.max() + 1), slice(cols.min(), cols.max() + 1))
    fig_box = fig_map[box]
    slope_rms, slope_max = metrics.slopes_urad(fig_box, surface.dx_mm)
    circ = settings.aperture != "rectangular"
    w = psd.window(
        np.isfinite(fig_box),
        kind=settings.psd_window,
        centre_rc=(geom.centre_rc[0] - rows.min(), geom.centre_rc[1] - cols.min())
        if circ
        else None,
        radius_px=geom.radius_px if circ else None,
    )
    bands = psd.band_rms(fig_box, surface.dx_mm, settings.psd_band_edges_per_mm, w=w)

    return SurfaceResult(
        pv_nm=metrics.pv(figure),
        rms_nm=metrics.rms(figure),
        pvr_nm=pvr,
        pvr_terms=k,
        zernike_nm=tuple((n, m, float(c)) for (n, m), c in zip(terms, coefs, strict=True)),
        sag_nm=float(2 * math.sqrt(3) * sphere_c[3]),
        irregularity_nm=metrics.pv(irregular),
        rsi_nm=float(rsi),
        rmst_nm=metrics.rms(total),
        rmsi_nm=metrics.rms(irregular),
        rmsa_nm=metrics.rms(irregular - rs_pixels),
        slope_rms_urad=slope_rms,
        slope_max_urad=slope_max,
        psd_bands=tuple(bands),
        valid_fraction=n_valid / basis.flat_index.size,
        valid_pixels=n_valid,
        aperture_pixels=int(basis.flat_index.size),
        aperture_centre_rc=geom.centre_rc,
        aperture_radius_mm=geom.radius_px * surface.dx_mm,
        kind=surface.kind,
        wavelength_nm=surface.wavelength_nm,
        settings_hash=settings.digest,
        outliers_removed=outliers,
        settings=settings,
    )
