"""``analyze(map, settings) -> Analysis``: the one entry point the services call.

Pipeline: resolve the clear aperture -> least-squares Zernike fit on the valid pixels ->
PV/RMS after the removed terms -> PVr -> ISO 10110-5 quantities -> slopes -> PSD bands.

Speed: everything that depends only on the grid and aperture is cached: the Gram matrix
G = B B^T of the basis B (terms x aperture pixels) and a separable form of B itself (see
:class:`_Basis`) through which B z and c B cost two thin matrix products on the map instead of
a pass over terms x pixels values. A station's maps share a grid but differ in dropouts; for
the valid pixels the normal matrix is G minus the dropouts' outer products (a low-rank
downdate, cost terms^2 x dropouts), so a new map costs the right-hand side, the downdate, a
small Cholesky solve and the synthesis of the fits the metrics need.

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

import itertools
import math
from collections import OrderedDict
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg
from threadpoolctl import threadpool_limits

from shopdb.surface import aperture, metrics, psd, zernike
from shopdb.surface.maps import SurfaceMap
from shopdb.surface.orient import unit_xy
from shopdb.surface.settings import AnalysisSettings

SOFTWARE_VERSION = "0.1.0"
_REMOVE_TERMS = {"piston": [(0, 0)], "tilt": [(1, -1), (1, 1)], "power": [(2, 0)]}


@dataclass(frozen=True)
class Analysis:
    """The numbers of one analysed map. Scalar attributes are named as the quantities of
    :mod:`shopdb.quantities` (and the result columns they are stored in).

    Notes
    -----
    Quantities as defined in the module notes (ISO 10110-5:2015 §4, ISO 14999-4:2015 §3,
    Evans 2009 for PVr); coefficients orthonormal, ANSI Z80.28 / ISO 24157 order.
    """

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
    wavelength_nm: float | None
    settings_hash: str
    software_version: str = SOFTWARE_VERSION
    outliers_removed: int = 0
    settings: AnalysisSettings = field(default_factory=AnalysisSettings)
    # where the PV-type quantities have their peak and valley, (rho, theta) on the unit disk:
    # "pv", "irregularity", "rsi" -> ((rho_p, theta_p), (rho_v, theta_v)); for the uncertainty
    # of a PV (shopdb.surface.sensitivity)
    extrema: dict = field(default_factory=dict)

    @property
    def nm_per_fringe(self) -> float | None:
        """One fringe of a double-pass test in nm (None without a test wavelength)."""
        if self.wavelength_nm is None:
            return None
        return self.wavelength_nm / 2 if self.kind == "surface" else self.wavelength_nm

    def coefficient(self, n: int, m: int) -> float:
        for nn, mm, c in self.zernike_nm:
            if (nn, mm) == (n, m):
                return c
        raise KeyError(f"Z({n},{m}) was not fitted")

    def stored(self) -> dict:
        """The result in its stored form: a value (None if not finite) per scalar quantity of the
        catalogue, ``psd_bands`` as dicts and ``zernike`` as {(n, m): nm}; the form
        :func:`shopdb.quantities.value_of` reads."""
        from shopdb import quantities

        out: dict = {}
        for q in quantities.SCALARS:
            v = getattr(self, q.name)
            out[q.name] = float(v) if v is not None and math.isfinite(v) else None
        out["psd_bands"] = [b.as_dict() for b in self.psd_bands]
        out["zernike"] = {(n, m): c for n, m, c in self.zernike_nm}
        return out

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
        """The stable JSON form (documented in the README). Without a test wavelength the
        fringe values (``iso10110_fringes``) are left out and ``notes`` says so."""
        iso = self.iso10110()
        per_fringe = self.nm_per_fringe
        fringes = (
            {"iso10110_fringes": {k.replace("_nm", "_fr"): v / per_fringe for k, v in iso.items()}}
            if per_fringe
            else {}
        )
        notes = [] if per_fringe else ["no test wavelength: the values in fringes are not given"]
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
            **fringes,
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
            "notes": notes,
        }


# --- cached basis -------------------------------------------------------------------------


class _Basis:
    """Everything that depends only on the grid and the aperture, in a form whose passes cost
    a few operations per pixel, not per pixel and term.

    The basis is not stored pixel by pixel. Every term is a polynomial of degree <= D (the
    highest radial order) in x and in y, so on any rectangle it equals its tensor Lagrange
    interpolant on (D+1) x (D+1) Chebyshev points, Z_i(x, y) = sum_qp Z_i(x_p, y_q) Lx_p(x)
    Ly_q(y), exactly. For a map z on such a rectangle, with Zn[i, (q, p)] = Z_i(x_p, y_q):

    - right-hand side  B z = Zn vec(Ly' Z Lx)  (moments of the map: two thin products);
    - synthesis        c B = Ly (c Zn) Lx'     (a rank-(D+1) outer product).

    1024^2, 66 terms: 1.8 and 1.0 ms, against 16 and 7 ms for streaming a stored 414 MiB basis.
    Outside the disk the terms grow (Z(20, 0) is ~4e7 at the corners of the circumscribed
    square) and rounding grows with them, so the bounding box is cut into ``BANDS`` row bands,
    each with a rectangle just wide enough for its aperture columns: the worst corner is then
    at rho^2 ~ 1 + 4 / BANDS instead of 2. Under 5 um of tilt, coefficients agree with a
    float64 lstsq on the evaluated basis within 3e-12 nm at order 10, 5e-11 nm at order 20 and
    2e-9 nm at order 30 (one band: 8e-7 nm at order 20). The Gram matrix G = B B' is summed
    once over blocks of basis columns evaluated by the recurrence; dropouts downdate it.
    """

    CHUNK = 1 << 15  # pixels per block of the Gram sums (two threads; 17 MB, in L3 for the product)
    EVAL = 1 << 14  # points per run of the recurrence
    PARALLEL = 1 << 18  # Gram sums over more pixels than this use two threads
    BANDS = 16

    def __init__(self, geom: aperture.Geometry, terms: list[tuple[int, int]], kind: str) -> None:
        self.terms = terms
        self.index = {t: i for i, t in enumerate(terms)}
        self.centre_rc = geom.centre_rc
        self.radius_px = geom.radius_px
        self.obscuration = geom.obscuration
        self.ncols = geom.shape[1]
        self.kind = kind
        self.flat_index = np.flatnonzero(geom.mask)
        rows, cols = np.divmod(self.flat_index, geom.shape[1])
        self.rho = np.hypot(*self._xy(rows, cols))
        self.G = self._gram(np.arange(self.flat_index.size))
        self.box = (
            slice(int(rows.min()), int(rows.max()) + 1),
            slice(int(cols.min()), int(cols.max()) + 1),
        )
        self.box_shape = (
            self.box[0].stop - self.box[0].start,
            self.box[1].stop - self.box[1].start,
        )
        # aperture pixel -> position in the flattened bounding box
        self.box_index = (rows - self.box[0].start) * self.box_shape[1] + (cols - self.box[1].start)
        self._windows: dict[tuple[str, bool], tuple[np.ndarray, float]] = {}
        # aperture pixel -> position in the bounding box zero-padded for the FFT
        self.pad_shape = psd.fast_shape(self.box_shape)
        self.pad_index = self.box_index + (rows - self.box[0].start) * (
            self.pad_shape[1] - self.box_shape[1]
        )
        self.bands = self._bands(rows, cols, max(n for n, _ in terms))

    def _xy(self, rows: np.ndarray, cols: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Unit-disk coordinates of pixels (the convention of :mod:`shopdb.surface.orient`)."""
        return unit_xy(rows, cols, self.centre_rc, self.radius_px)

    def _bands(self, rows: np.ndarray, cols: np.ndarray, degree: int) -> list[tuple]:
        """Per row band: (row slice, column slice) of the box, Ly, Lx and Zn (see the class notes)."""
        nodes = np.cos(np.pi * (np.arange(degree + 1) + 0.5) / (degree + 1))  # Chebyshev, 1st kind
        to_lagrange = np.linalg.inv(np.polynomial.chebyshev.chebvander(nodes, degree))

        def lagrange(pixels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            """Lagrange matrix (pixel x node) on [first - 1/2, last + 1/2] and the nodes' pixel
            coordinates (the half-pixel margin keeps a one-pixel interval wide)."""
            lo, hi = pixels[0] - 0.5, pixels[-1] + 0.5
            u = (pixels - (lo + hi) / 2) / ((hi - lo) / 2)
            lag = np.polynomial.chebyshev.chebvander(u, degree) @ to_lagrange
            return lag, (lo + hi) / 2 + (hi - lo) / 2 * nodes

        r0, c0 = self.box[0].start, self.box[1].start
        edges = np.linspace(0, self.box_shape[0], min(self.BANDS, self.box_shape[0]) + 1)
        edges = np.unique(np.round(edges).astype(int))
        starts = np.searchsorted(rows, r0 + edges)  # rows ascend with the flat index
        out, xs, ys = [], [], []
        for (a, b), (s, e) in zip(
            itertools.pairwise(edges), itertools.pairwise(starts), strict=True
        ):
            if s == e:  # no aperture pixel in these rows
                continue
            ca, cb = int(cols[s:e].min()), int(cols[s:e].max()) + 1
            ly, row_nodes = lagrange(np.arange(r0 + a, r0 + b, dtype=float))
            lx, col_nodes = lagrange(np.arange(ca, cb, dtype=float))
            x, y = np.broadcast_arrays(*self._xy(row_nodes[:, None], col_nodes[None, :]))
            xs.append(x.ravel())
            ys.append(y.ravel())
            out.append((slice(a, b), slice(ca - c0, cb - c0), ly, lx))
        zn = np.empty((len(self.terms), sum(x.size for x in xs)))
        self._values(np.concatenate(xs), np.concatenate(ys), zn)  # all bands' nodes in one call
        per_band = (degree + 1) ** 2
        return [(*band, zn[:, i * per_band : (i + 1) * per_band]) for i, band in enumerate(out)]

    @property
    def nbytes(self) -> int:
        arrays = [self.flat_index, self.rho, self.box_index, self.pad_index]
        arrays += [w for w, _ in self._windows.values()]
        arrays += [a for band in self.bands for a in band[2:]]
        return sum(a.nbytes for a in arrays)

    def window(self, kind: str, circular: bool) -> tuple[np.ndarray, float]:
        """PSD window (aperture mask times the taper) at the aperture pixels, and its sum of
        squares; cached."""
        key = (kind, circular)
        if key not in self._windows:
            if kind == "none":
                w_ap = np.ones(self.rho.size)
            elif circular:
                w_ap = psd.radial_taper(self.rho)
            else:
                mask = np.zeros(self.box_shape, bool)
                mask.ravel()[self.box_index] = True
                w_ap = np.take(psd.window(mask, kind=kind).ravel(), self.box_index)
            self._windows[key] = (w_ap, float(w_ap @ w_ap))
        return self._windows[key]

    def rhs(self, z: np.ndarray) -> np.ndarray:
        """B z for values z at the aperture pixels (zero at the dropouts)."""
        box = np.zeros(self.box_shape)
        box.ravel()[self.box_index] = z
        out = np.zeros(len(self.terms))
        for rs, cs, ly, lx, zn in self.bands:
            out += zn @ (ly.T @ box[rs, cs] @ lx).ravel()
        return out

    def synth(self, C: np.ndarray) -> np.ndarray:
        """Surfaces C @ B[:k] at the aperture pixels for coefficient rows C (rows x k)."""
        k = C.shape[1]
        box = np.zeros((C.shape[0], *self.box_shape))
        for rs, cs, ly, lx, zn in self.bands:
            nodes = (C @ zn[:k]).reshape(C.shape[0], ly.shape[1], lx.shape[1])
            box[:, rs, cs] = ly @ nodes @ lx.T
        return np.take(box.reshape(C.shape[0], -1), self.box_index, axis=1)

    def columns(self, idx: np.ndarray) -> np.ndarray:
        """Basis values (terms x len(idx)) at the aperture pixels ``idx``, by the recurrence, in
        runs of ``EVAL`` points whose working arrays stay in the core's cache (74 k points:
        25 -> 22 ms)."""
        out = np.empty((len(self.terms), idx.size))
        for s in range(0, idx.size, self.EVAL):
            rows, cols = np.divmod(np.take(self.flat_index, idx[s : s + self.EVAL]), self.ncols)
            self._values(*self._xy(rows, cols), out[:, s : s + self.EVAL])
        return out

    def _values(self, x: np.ndarray, y: np.ndarray, out: np.ndarray) -> None:
        """Basis values at unit-disk coordinates (x, y) into ``out`` (terms x points)."""
        rho = np.hypot(x, y)
        if self.kind == "annular":
            out[:] = zernike.annular_basis(self.terms, rho, np.arctan2(y, x), self.obscuration)
            return
        with np.errstate(invalid="ignore", divide="ignore"):
            cos_t, sin_t = x / rho, y / rho
        at_centre = rho == 0
        cos_t[at_centre], sin_t[at_centre] = 1.0, 0.0
        zernike.fill_basis(out, self.terms, rho, cos_t, sin_t)

    def _gram(self, idx: np.ndarray) -> np.ndarray:
        """Gram matrix of the basis columns at the aperture pixels ``idx``.

        numpy releases the GIL in its loops: two threads evaluate blocks and multiply out their
        shares while the block is fresh in cache, each product on one BLAS thread (two threads
        each starting a two-thread BLAS product oversubscribe two cores)."""

        def block(s: int) -> np.ndarray:
            b = self.columns(idx[s : s + self.CHUNK])
            return b @ b.T

        starts = range(0, idx.size, self.CHUNK)
        zero = np.zeros((len(self.terms), len(self.terms)))
        if idx.size <= self.PARALLEL:  # a map's dropouts: threads cost more than they gain
            return sum(map(block, starts), zero)
        with threadpool_limits(1, user_api="blas"), ThreadPoolExecutor(2) as pool:
            return sum(pool.map(block, starts), zero)

    def normal_matrix(self, dropped: np.ndarray) -> np.ndarray:
        """Gram matrix over the aperture pixels minus ``dropped`` (positions in the aperture):
        a low-rank downdate, cost terms^2 x dropouts, or the sum over the valid pixels when
        more than half are dropped."""
        if dropped.size == 0:
            return self.G
        if dropped.size * 2 < self.flat_index.size:
            return self.G - self._gram(dropped)
        keep = np.ones(self.flat_index.size, bool)
        keep[dropped] = False
        return self._gram(np.flatnonzero(keep))


_CACHE: OrderedDict[tuple, _Basis] = OrderedDict()
CACHE_BYTES = 512 * 2**20  # a basis holds ~48 bytes per aperture pixel: 40 MB at 1024^2


def _basis_for(geom: aperture.Geometry, terms: list[tuple[int, int]], kind: str) -> _Basis:
    key = (geom.key, tuple(terms), kind)
    hit = _CACHE.get(key)
    if hit is not None:
        _CACHE.move_to_end(key)
        return hit
    need = 48 * int(geom.mask.sum())
    while _CACHE and sum(v.nbytes for v in _CACHE.values()) + need > CACHE_BYTES:
        _CACHE.popitem(last=False)  # free before building, to bound peak memory
    b = _Basis(geom, terms, kind)
    _CACHE[key] = b
    return b


def clear_cache() -> None:
    """Drop every cached basis (frees its memory).

    Notes
    -----
    The cache of :class:`_Basis` per grid and aperture (see the module notes) holds no result;
    clearing it only costs the next map its basis.
    """
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


def resolve_aperture(surface: SurfaceMap, settings: AnalysisSettings) -> aperture.Geometry:
    """The clear aperture the settings describe, on this map.

    Notes
    -----
    Circle fit after Kasa, IEEE Trans. Instrum. Meas. 25(1):8 (1976), refined as
    :func:`shopdb.surface.aperture.fit_circle` says.
    """
    return aperture.resolve(
        np.isfinite(surface.height_nm),
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


def analyze(surface: SurfaceMap, settings: AnalysisSettings | None = None) -> Analysis:
    """Analyse a height map; see the module notes for the definitions used.

    Notes
    -----
    Least-squares Zernike fit on the valid pixels (orthonormal terms, ANSI Z80.28 / ISO 24157);
    ISO 10110-5:2015 quantities over the clear aperture; PVr after Evans, Opt. Eng. 48(4) 043605
    (2009); PSD band RMS by Parseval over the windowed map (Heinzel, Rüdiger & Schilling, MPI
    report 2002). See the module notes for each definition.

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
    geom = resolve_aperture(surface, settings)
    terms = zernike.terms_up_to(settings.zernike_order)
    basis = _basis_for(
        geom, terms, settings.zernike_basis if settings.aperture == "annular" else "circle"
    )
    z_ap = np.take(z_full.ravel(), basis.flat_index)  # np.take: ~4x faster than fancy indexing
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
        resid = np.where(good, z0 - basis.synth(coefs[None, :])[0], np.nan)
        med = np.nanmedian(resid)
        sigma = 1.4826 * np.nanmedian(np.abs(resid - med))  # MAD estimate of sigma
        spikes = np.flatnonzero(
            good & (np.abs(resid - med) > settings.outlier_sigma * max(sigma, 1e-12))
        )
        if spikes.size:
            outliers = int(spikes.size)
            Bs = basis.columns(spikes)
            G = G - Bs @ Bs.T
            rhs = rhs - Bs @ z0[spikes]
            good[spikes] = False
            z0[spikes] = 0.0
            z_ap[spikes] = np.nan
            dropped = np.flatnonzero(~good)
            n_valid -= outliers
            coefs = _solve(G, rhs, f"{len(terms)} Zernike terms")

    def lsq(names: list[tuple[int, int]]) -> tuple[list[int], np.ndarray]:
        """Least-squares fit of just these terms on the valid pixels: (rows, coefs)."""
        idx = [basis.index[t] for t in names]
        return idx, _solve(G[np.ix_(idx, idx)], rhs[idx], "the low-order terms")

    removed = [t for name in settings.remove for t in _REMOVE_TERMS[name]]
    rm_idx = [basis.index[t] for t in removed]
    pt = [(0, 0), (1, -1), (1, 1)]
    sph_idx, sph_c = lsq([*pt, (2, 0)])
    _, pt_c = lsq(pt)
    k = len(zernike.terms_up_to(settings.pvr_order or settings.zernike_order))
    _, c_pvr = lsq(terms[:k])

    # The pixel maps, on the aperture pixels with NaN at the dropouts (PV ignores NaN; sums of
    # squares after zeroing the dropouts): from the five lowest rows (piston, tilts, astigmatism
    # 45, defocus) the removed terms' fit (figure) and the best-fit sphere (irregularity); the
    # PVr fit from its rows.
    low = np.zeros((2, 5))
    if rm_idx:
        low[0, rm_idx] = _solve(G[np.ix_(rm_idx, rm_idx)], rhs[rm_idx], "the removed terms")
    low[1, sph_idx] = sph_c
    low_maps = basis.synth(low)
    figure = z_ap - low_maps[0]
    irregular = z_ap - low_maps[1]
    c_shown = c_pvr.copy()
    c_shown[rm_idx] = 0.0
    fit_shown = basis.synth(c_shown[None, :])[0]
    fit_shown[dropped] = np.nan
    pv_figure, pv_irregular = metrics.pv(figure), metrics.pv(irregular)

    def polar_of(v: np.ndarray) -> tuple[tuple[float, float], tuple[float, float]]:
        """(rho, theta) of the peak and the valley of values at the aperture pixels."""
        picks = np.array([np.nanargmax(v), np.nanargmin(v)])
        r, c = np.divmod(np.take(basis.flat_index, picks), basis.ncols)
        x, y = basis._xy(r, c)
        rho_, th_ = np.hypot(x, y), np.arctan2(y, x)
        return (float(rho_[0]), float(th_[0])), (float(rho_[1]), float(th_[1]))

    extrema = {"pv": polar_of(figure), "irregularity": polar_of(irregular)}
    # slopes of the figure map on the aperture's bounding box (NaN where no data)
    fig_box = np.full(basis.box_shape[0] * basis.box_shape[1], np.nan)
    fig_box[basis.box_index] = figure
    slope_rms, slope_max = metrics.slopes_urad(fig_box.reshape(basis.box_shape), surface.dx_mm)

    def sum_sq(v: np.ndarray) -> float:
        v[dropped] = 0.0
        return float(v @ v)

    fig_ss, sph_ss = sum_sq(figure), sum_sq(irregular)
    # Other residual sums of squares relative to the irregularity r = z - B_s s, which the normal
    # equations make orthogonal to the sphere terms: for a fit c of a term set containing them,
    # ||z - B c||^2 = ||r||^2 - d' G d with d = c - s (zero-padded), and for piston + tilt p,
    # ||z - B p||^2 = ||r||^2 + d' G d with d = s - p. Neither subtracts huge sums (as
    # z.z - c.(B z) would under microns of tilt).

    def quad(idx: list[int], d: np.ndarray) -> float:
        return float(d @ G[np.ix_(idx, idx)] @ d)

    d_pvr = c_pvr.copy()
    d_pvr[sph_idx] -= sph_c
    pvr_ss = max(sph_ss - quad(list(range(k)), d_pvr), 0.0)
    pt_ss = sph_ss + quad(sph_idx, sph_c - np.append(pt_c, 0.0))
    pvr = metrics.pv(fit_shown) + 3 * math.sqrt(pvr_ss / n_valid)

    # rotationally symmetric part of the irregularity: m = 0, n >= 4 terms of the full fit;
    # ||r - rs||^2 = ||r||^2 - 2 c_rs.(B_rs r) + c_rs' G_rs c_rs, with B_rs r = rhs_rs - G[rs, sph] s
    rs_idx = [basis.index[(n, 0)] for n in range(4, settings.zernike_order + 1, 2)]
    rho_line = np.linspace(geom.obscuration, 1.0, 2049)
    rs_line = sum(
        (coefs[i] * zernike.zernike(*terms[i], rho_line, np.zeros(1)) for i in rs_idx),
        np.zeros(1),
    )
    rsi = metrics.pv(rs_line)
    if rs_idx:
        extrema["rsi"] = (
            (float(rho_line[int(np.argmax(rs_line))]), 0.0),
            (float(rho_line[int(np.argmin(rs_line))]), 0.0),
        )
    c_rs = coefs[rs_idx]
    b_rs_irr = rhs[rs_idx] - G[np.ix_(rs_idx, sph_idx)] @ sph_c
    rsa_ss = max(sph_ss - 2 * float(c_rs @ b_rs_irr) + quad(rs_idx, c_rs), 0.0)

    # PSD of the figure. A dropout left empty is a hole in the window, whose spectrum leaks the
    # form into every band (2 % scattered dropouts under 100 nm of power put several nm into the
    # finest band); a dropout takes the full Zernike fit's value there instead (the surface's
    # low-order estimate, without the removed terms), so the window stays whole.
    w_ap, w_ss = basis.window(settings.psd_window, circular=settings.aperture != "rectangular")
    if dropped.size:
        bd = basis.columns(dropped)
        figure[dropped] = coefs @ bd - low[0] @ bd[: low.shape[1]]
    zw = np.zeros(basis.pad_shape)
    zw.ravel()[basis.pad_index] = figure * w_ap
    energy = w_ss / zw.size
    bands = psd.bands_of_weighted(
        zw, surface.dx_mm, energy, settings.psd_band_edges_per_mm, basis.box_shape
    )

    return Analysis(
        pv_nm=pv_figure,
        rms_nm=math.sqrt(fig_ss / n_valid),
        pvr_nm=pvr,
        pvr_terms=k,
        zernike_nm=tuple((n, m, float(c)) for (n, m), c in zip(terms, coefs, strict=True)),
        sag_nm=float(2 * math.sqrt(3) * sph_c[3]),
        irregularity_nm=pv_irregular,
        rsi_nm=float(rsi),
        rmst_nm=math.sqrt(pt_ss / n_valid),
        rmsi_nm=math.sqrt(sph_ss / n_valid),
        rmsa_nm=math.sqrt(rsa_ss / n_valid),
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
        extrema=extrema,
    )
