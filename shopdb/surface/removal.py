"""The difference of two maps of one part: what a polishing run removed (before − after),
registered on the part's aperture.

Notes
-----
Two maps of a part taken on different days sit a little differently on the detector. Each map's
aperture is found from its valid pixels (:func:`shopdb.surface.aperture.fit_circle`); the later
map is shifted by the difference of the two centres (bilinear interpolation, scipy.ndimage) onto
the earlier map's grid, so the difference compares the same points of the part. An interferometer
measures heights up to a constant (and its alignment tilt), so the difference is taken after
removing piston — and, by choice, tilt and power — fitted over the pixels valid in both; the
removal's absolute depth is not in the maps (common practice in optical testing).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from shopdb.surface.aperture import fit_circle
from shopdb.surface.orient import unit_xy

REMOVABLE = ("piston", "tilt", "power")


@dataclass(frozen=True)
class Difference:
    """``before − after`` on the earlier map's grid (NaN where either has no data), the shift
    (rows, cols) applied to the later map, and the difference's PV and RMS in nm.

    Notes
    -----
    See the module notes (registration on the fitted aperture centres).
    """

    map_nm: np.ndarray
    shift_rc: tuple[float, float]
    pv_nm: float
    rms_nm: float
    valid_pixels: int


def _shifted(z: np.ndarray, shift_rc: tuple[float, float]) -> np.ndarray:
    """The map moved by a sub-pixel shift; a pixel is valid only where all four neighbours were."""
    if shift_rc == (0.0, 0.0):
        return z
    valid = np.isfinite(z)
    moved = ndimage.shift(np.where(valid, z, 0.0), shift_rc, order=1, mode="constant", cval=0.0)
    coverage = ndimage.shift(valid.astype(float), shift_rc, order=1, mode="constant", cval=0.0)
    return np.where(coverage > 1 - 1e-9, moved, np.nan)


def difference(
    before_nm: np.ndarray,
    after_nm: np.ndarray,
    *,
    remove: tuple[str, ...] = ("piston",),
    register: bool = True,
) -> Difference:
    """``before − after`` registered on the aperture, with ``remove`` (piston, tilt, power)
    fitted away over the common pixels.

    Notes
    -----
    See the module notes.

    Examples
    --------
    >>> import numpy as np
    >>> y, x = np.mgrid[-1:1:65j, -1:1:65j]
    >>> disk = np.where(x**2 + y**2 <= 0.9, 1.0, np.nan)
    >>> d = difference(disk * (5 + 3 * x), disk * 3 * x)
    >>> round(d.rms_nm, 6), d.shift_rc
    (0.0, (0.0, 0.0))
    """
    b, a = np.asarray(before_nm, float), np.asarray(after_nm, float)
    if b.shape != a.shape:
        raise ValueError(f"the maps must share one grid, got {b.shape} and {a.shape}")
    shift = (0.0, 0.0)
    centre, radius = (b.shape[0] / 2, b.shape[1] / 2), max(b.shape) / 2
    if register:
        try:
            cb, radius = fit_circle(np.isfinite(b))
            ca, _ = fit_circle(np.isfinite(a))
        except ValueError:
            cb = ca = centre
        shift = (round(cb[0] - ca[0], 3), round(cb[1] - ca[1], 3))
        centre = cb
        a = _shifted(a, shift)
    d = detrend(b - a, remove, centre=centre, radius=radius)
    v = d[np.isfinite(d)]
    return Difference(
        d, shift, float(v.max() - v.min()), float(np.sqrt(np.mean(v * v))), int(v.size)
    )


def detrend(
    z: np.ndarray,
    remove: tuple[str, ...] = ("piston", "tilt"),
    *,
    centre: tuple[float, float] | None = None,
    radius: float | None = None,
) -> np.ndarray:
    """A copy of the map with ``remove`` (piston, tilt, power) fitted by least squares over its
    valid pixels and subtracted; the unit circle is the fitted aperture unless given.

    Notes
    -----
    Piston and tilt are the alignment of the part in the interferometer, not its figure (common
    practice); the fit uses the plain monomials 1, x, y, x² + y² on the unit disk.

    Examples
    --------
    >>> import numpy as np
    >>> y, x = np.mgrid[-1:1:33j, -1:1:33j]
    >>> z = np.where(x**2 + y**2 <= 1, 2 + 4 * x - y, np.nan)
    >>> float(np.nanmax(np.abs(detrend(z)))) < 1e-9
    True
    """
    unknown = set(remove) - set(REMOVABLE)
    if unknown:
        raise ValueError(f"cannot remove {sorted(unknown)}: choose from {', '.join(REMOVABLE)}")
    d = np.array(z, dtype=float)
    good = np.isfinite(d)
    if good.sum() < 4:
        raise ValueError("the two maps share no valid pixels" if centre else "too few valid pixels")
    if centre is None or radius is None:
        try:
            centre, radius = fit_circle(good)
        except ValueError:
            centre, radius = (d.shape[0] / 2, d.shape[1] / 2), max(d.shape) / 2
    rows, cols = np.nonzero(good)
    x, y = unit_xy(rows, cols, centre, radius)
    columns = [np.ones(rows.size)] if "piston" in remove else []
    if "tilt" in remove:
        columns += [x, y]
    if "power" in remove:
        columns.append(x * x + y * y)
    if columns:
        basis = np.column_stack(columns)
        coef, *_ = np.linalg.lstsq(basis, d[good], rcond=None)
        d[good] = d[good] - basis @ coef
    return d


def from_terms(like: np.ndarray, terms) -> np.ndarray:
    """The surface of Zernike ``terms`` ((n, m, nm), orthonormal, ANSI) on the aperture of
    ``like`` (its valid pixels' fitted circle), NaN outside: a stored removal's shape on
    another map of the part.

    Notes
    -----
    Coordinates of :func:`shopdb.surface.orient.unit_xy`; terms as the analysis fits them.

    Examples
    --------
    >>> import numpy as np
    >>> y, x = np.mgrid[-1:1:65j, -1:1:65j]
    >>> disk = np.where(x**2 + y**2 <= 1, 0.0, np.nan)
    >>> z = from_terms(disk, [(1, 1, 2.0)])
    >>> round(float(np.nanstd(z)), 1)  # an orthonormal term's RMS is its coefficient
    2.0
    """
    from shopdb.surface.zernike import zernike

    valid = np.isfinite(like)
    centre, radius = fit_circle(valid)
    rows, cols = np.nonzero(valid)
    ux, uy = unit_xy(rows, cols, centre, radius)
    rho, theta = np.hypot(ux, uy), np.arctan2(uy, ux)
    out = np.full(like.shape, np.nan)
    total = np.zeros(rows.size)
    for n, m, c in terms:
        total += c * zernike(int(n), int(m), np.minimum(rho, 1.0), theta)
    out[rows, cols] = total
    return out
