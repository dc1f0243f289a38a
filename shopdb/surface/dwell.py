"""Sub-aperture polishing: tool influence functions and the dwell map of the next run.

Notes
-----
A sub-aperture tool held at a point removes material at a rate given by its tool influence
function (TIF), in nm/s as a function of the offset from the tool centre. Over a run the tool
visits the points of a machine grid and dwells ``t_k`` seconds at point ``k``; the removal is the
convolution (Jones, Appl. Opt. 16(1):218, 1977; Carnal, Egert & Hylton, Appl. Opt. 31(25):5251,
1992)::

    removal(x) = sum_k TIF(x - x_k) * t_k,    t_k >= 0.

The plan is the dwell that best removes the target — the part's error above its lowest point —
over the clear aperture, found as Tikhonov-regularised non-negative least squares (after Carnal,
Egert & Hylton 1992)::

    minimise  || P M (A t - b) ||^2 + lam ||t||^2   subject to  t >= 0

with ``A`` the convolution on the machine grid, ``M`` the clear-aperture mask, ``P`` the removal
of the mean (a uniform extra depth costs nothing but time, so piston is free) and ``b`` the
target. It is solved by the fast iterative shrinkage-thresholding algorithm with the projection
onto ``t >= 0`` (FISTA: Beck & Teboulle, SIAM J. Imaging Sci. 2(1):183, 2009), every product
with ``A`` and its adjoint an FFT convolution. The problem is solved on the machine grid (the TIF
sampled at the grid spacing: exact at the grid points); the predicted removal is then evaluated
once on the map's own pixels.

A Gaussian TIF ``peak * exp(-r^2 / (2 sigma^2))`` removes ``2 pi sigma^2 peak`` (nm mm^2/s) of
volume per second. A measured TIF is a spot test: the removal of a stationary dwell (before −
after) divided by its dwell time.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import fft, ndimage


def convolve(a: np.ndarray, kernel: np.ndarray) -> np.ndarray:
    """Linear 2-D convolution of ``a`` with ``kernel`` (odd sides, centred), the shape of ``a``
    (scipy.signal.fftconvolve(a, kernel, mode="same"); multithreaded real FFTs).

    Notes
    -----
    The removal sum of the module notes: zero-padded real FFTs of the full linear size, cropped
    to the centre (the convention of scipy.signal.fftconvolve, which a test holds it to).
    """
    kr, kc = kernel.shape
    shape = (a.shape[0] + kr - 1, a.shape[1] + kc - 1)
    fshape = tuple(fft.next_fast_len(n, real=True) for n in shape)
    spec = fft.rfft2(a, fshape, workers=-1) * fft.rfft2(kernel, fshape, workers=-1)
    full = fft.irfft2(spec, fshape, workers=-1)
    r0, c0 = (kr - 1) // 2, (kc - 1) // 2
    return full[r0 : r0 + a.shape[0], c0 : c0 + a.shape[1]]


@dataclass(frozen=True)
class GaussianTIF:
    """A parametric TIF: ``peak_nm_per_s * exp(-r² / (2 sigma_mm²))``, cut at ``cut_sigmas``.

    Notes
    -----
    Its volume removal rate is the Gaussian integral ``2 pi sigma² peak`` (module notes); cut at
    ±4 sigma the kernel leaves out e^-8 of it.
    """

    sigma_mm: float
    peak_nm_per_s: float
    cut_sigmas: float = 4.0

    def __post_init__(self) -> None:
        if not (self.sigma_mm > 0 and self.peak_nm_per_s > 0):
            raise ValueError("a Gaussian TIF needs a positive sigma and peak removal rate")

    @property
    def volume_rate_mm3_per_min(self) -> float:
        """Closed form: ``2 pi sigma² peak`` nm·mm²/s, in mm³/min."""
        return 2 * math.pi * self.sigma_mm**2 * self.peak_nm_per_s * 1e-6 * 60

    @property
    def diameter_mm(self) -> float:
        return 2 * self.cut_sigmas * self.sigma_mm

    def kernel(self, dx_mm: float) -> np.ndarray:
        half = max(1, math.ceil(self.cut_sigmas * self.sigma_mm / dx_mm))
        r = np.arange(-half, half + 1) * dx_mm
        g = np.exp(-(r**2) / (2 * self.sigma_mm**2))
        return self.peak_nm_per_s * np.outer(g, g)


@dataclass(frozen=True)
class MeasuredTIF:
    """A TIF from a spot test: removal rate (nm/s) on a square grid of spacing ``dx_mm``,
    centred on its odd-sided array.

    Notes
    -----
    Resampled to another spacing by cubic splines (scipy.ndimage.map_coordinates); the rate
    at each point is kept, so the volume rate scales with the spacing squared as it must.
    """

    rate_nm_per_s: np.ndarray
    dx_mm: float

    @property
    def volume_rate_mm3_per_min(self) -> float:
        return float(self.rate_nm_per_s.sum()) * self.dx_mm**2 * 1e-6 * 60

    @property
    def diameter_mm(self) -> float:
        return self.rate_nm_per_s.shape[0] * self.dx_mm

    def kernel(self, dx_mm: float) -> np.ndarray:
        """Resampled to ``dx_mm`` (cubic spline), rate per point kept."""
        k = self.rate_nm_per_s
        half = max(1, math.floor((k.shape[0] // 2) * self.dx_mm / dx_mm))
        pos = np.arange(-half, half + 1) * dx_mm / self.dx_mm + k.shape[0] // 2
        rr, cc = np.meshgrid(pos, pos, indexing="ij")
        return np.clip(ndimage.map_coordinates(k, [rr, cc], order=3, mode="constant"), 0, None)


def spot_tif(
    before_nm: np.ndarray, after_nm: np.ndarray, dx_mm: float, dwell_s: float, diameter_mm: float
) -> MeasuredTIF:
    """A spot test's TIF: (before − after) / dwell, centred on the removal's centroid and cut to
    ``diameter_mm``; the removal's far field (its median outside the spot) is its zero.

    Notes
    -----
    Interferometric maps carry no absolute height (common practice), so the level of the
    removal is taken from the edge of the cut spot; negative rates (noise) are set to zero.
    """
    if not dwell_s > 0:
        raise ValueError("a spot test needs a positive dwell time")
    removal = np.asarray(before_nm, float) - np.asarray(after_nm, float)
    if removal.shape != np.shape(before_nm) or not np.isfinite(removal).any():
        raise ValueError("the spot test's maps do not overlap")
    removal = np.where(np.isfinite(removal), removal, np.nanmedian(removal))
    half = max(1, round(diameter_mm / dx_mm / 2))
    weight = np.clip(removal - np.median(removal), 0, None)
    cr, cc = ndimage.center_of_mass(weight)
    r0, c0 = round(cr), round(cc)
    if (
        r0 - half < 0
        or c0 - half < 0
        or r0 + half >= removal.shape[0]
        or (c0 + half >= removal.shape[1])
    ):
        raise ValueError("the spot is too close to the edge of the map for its diameter")
    spot = removal[r0 - half : r0 + half + 1, c0 - half : c0 + half + 1]
    ring = np.ones_like(spot, bool)
    ring[1:-1, 1:-1] = False
    rate = np.clip((spot - np.median(spot[ring])) / dwell_s, 0, None)
    return MeasuredTIF(rate, dx_mm)


@dataclass(frozen=True)
class DwellPlan:
    """A plan on the machine grid and its prediction on the map's pixels.

    ``dwell_s`` is (rows, cols) on the grid of ``spacing_mm`` whose point (0, 0) sits at map
    pixel ``origin_rc``; ``removal_nm`` and ``predicted_nm`` are on the map's pixels (NaN where
    the map has no data; ``predicted_nm`` = map − removal with its mean removed).

    Notes
    -----
    See the module notes: the dwell is exact at the grid points; between them the prediction
    is the convolution evaluated on the map's pixels.
    """

    dwell_s: np.ndarray
    spacing_mm: float
    step_px: int
    origin_rc: tuple[int, int]
    removal_nm: np.ndarray
    predicted_nm: np.ndarray
    iterations: int

    @property
    def total_time_s(self) -> float:
        return float(self.dwell_s.sum())

    def grid_mm(self) -> tuple[np.ndarray, np.ndarray]:
        """Machine coordinates (x right, y up, mm) of each grid point, relative to map pixel
        (0, 0)'s centre; rows of the map run down."""
        rows, cols = self.dwell_s.shape
        x = (self.origin_rc[1] + np.arange(cols) * self.step_px) * (self.spacing_mm / self.step_px)
        y = -(self.origin_rc[0] + np.arange(rows) * self.step_px) * (self.spacing_mm / self.step_px)
        return np.meshgrid(x, y)


def plan_dwell(
    height_nm: np.ndarray,
    dx_mm: float,
    tif,
    *,
    spacing_mm: float = 1.0,
    margin_mm: float | None = None,
    regularisation: float = 1e-4,
    iterations: int = 400,
    tolerance: float = 1e-5,
) -> DwellPlan:
    """The dwell map that removes ``height_nm`` (NaN outside the aperture) down to its lowest
    level, as far as ``tif`` can (see the module notes). ``margin_mm`` is how far beyond the
    aperture the tool centre may go (default half the TIF's diameter); ``regularisation`` is
    lam relative to the squared TIF sum.

    Notes
    -----
    Tikhonov-regularised NNLS (Carnal, Egert & Hylton 1992) by FISTA with projection (Beck &
    Teboulle 2009), step 1/L with L = (sum K)² + lam >= ||A||² + lam; see the module notes.
    """
    h = np.asarray(height_nm, float)
    valid = np.isfinite(h)
    if h.ndim != 2 or valid.sum() < 16:
        raise ValueError("the map has too few valid pixels to plan on")
    if not (dx_mm > 0 and spacing_mm > 0):
        raise ValueError("pixel size and grid spacing must be positive")
    step = max(1, round(spacing_mm / dx_mm))
    spacing = step * dx_mm
    margin = tif.diameter_mm / 2 if margin_mm is None else float(margin_mm)
    if margin < 0:
        raise ValueError("the margin cannot be negative")
    rows, cols = np.nonzero(valid)
    cr, cc = rows.mean(), cols.mean()
    radius_px = math.sqrt(valid.sum() / math.pi)
    pad = math.ceil(margin / dx_mm) + step
    # the machine grid: every step-th pixel of the padded map, one point on the aperture centre
    r_first = round(cr) - step * math.ceil((round(cr) + pad) / step)
    c_first = round(cc) - step * math.ceil((round(cc) + pad) / step)
    gr = np.arange(r_first, h.shape[0] + pad, step)
    gc = np.arange(c_first, h.shape[1] + pad, step)
    RR, CC = np.meshgrid(gr, gc, indexing="ij")
    allowed = np.hypot(RR - cr, CC - cc) * dx_mm <= radius_px * dx_mm + margin
    # the target at the grid points: the map smoothed over one grid cell, above its lowest point
    fill = np.where(valid, h, 0.0)
    box = ndimage.uniform_filter(fill, step) / np.maximum(
        ndimage.uniform_filter(valid.astype(float), step), 1e-12
    )
    inside = (RR >= 0) & (RR < h.shape[0]) & (CC >= 0) & (CC < h.shape[1])
    mask = np.zeros(RR.shape, bool)
    mask[inside] = valid[RR[inside], CC[inside]]
    b = np.zeros(RR.shape)
    b[mask] = box[RR[mask], CC[mask]]
    b[mask] -= b[mask].min()
    k = tif.kernel(spacing)
    ksum = float(k.sum())
    lam = regularisation * ksum**2
    step_size = 1.0 / (ksum**2 + lam)  # ||A||² <= (sum K)² for a non-negative kernel
    k_adj = k[::-1, ::-1]
    n_mask = mask.sum()

    def residual(t):
        r = np.where(mask, convolve(t, k) - b, 0.0)
        r[mask] -= r[mask].sum() / n_mask
        return r

    t = np.zeros(RR.shape)
    y, theta = t.copy(), 1.0
    done = 0
    while done < iterations:
        done += 1
        grad = convolve(residual(y), k_adj) + lam * y
        t_next = np.where(allowed, np.clip(y - step_size * grad, 0, None), 0.0)
        theta_next = (1 + math.sqrt(1 + 4 * theta**2)) / 2
        y = t_next + ((theta - 1) / theta_next) * (t_next - t)
        change = float(np.linalg.norm(t_next - t)) / max(float(np.linalg.norm(t_next)), 1e-30)
        t, theta = t_next, theta_next
        if change < tolerance:
            break
    # the prediction on the map's pixels: each grid point's dwell at its pixel, one convolution
    top, left = -min(0, gr[0]), -min(0, gc[0])
    big = np.zeros((max(h.shape[0], gr[-1] + 1) + top, max(h.shape[1], gc[-1] + 1) + left))
    big[np.ix_(gr + top, gc + left)] = t
    removal = convolve(big, tif.kernel(dx_mm))[top : top + h.shape[0], left : left + h.shape[1]]
    removal = np.where(valid, removal, np.nan)
    predicted = h - removal
    predicted -= np.nanmean(predicted)
    return DwellPlan(t, spacing, step, (int(gr[0]), int(gc[0])), removal, predicted, done)
