"""Synthetic maps for the surface tests (built from the definitions, not from analyze)."""

from __future__ import annotations

import numpy as np

from shopdb.surface import zernike
from shopdb.surface.maps import SurfaceMap


def grid(npix: int, *, obscuration: float = 0.0):
    """Polar coordinates of a square grid whose unit circle touches the edge pixel centres."""
    c = (npix - 1) / 2
    r, col = np.mgrid[:npix, :npix]
    x = (col - c) / c
    y = (c - r) / c
    rho, theta = np.hypot(x, y), np.arctan2(y, x)
    inside = (rho <= 1) & (rho >= obscuration)
    return rho, theta, inside, (c, c), c


def synth(
    coefs: dict[tuple[int, int], float],
    npix: int,
    *,
    dx_mm: float = 0.1,
    obscuration: float = 0.0,
    dropout_fraction: float = 0.0,
    rng=None,
    noise_nm: float = 0.0,
    wavelength_nm: float = 632.8,
    annular: bool = False,
) -> SurfaceMap:
    rho, theta, inside, centre, radius = grid(npix, obscuration=obscuration)
    z = np.zeros(rho.shape)
    for (n, m), c in coefs.items():
        f = (
            zernike.annular_zernike(n, m, rho, theta, obscuration)
            if annular
            else zernike.zernike(n, m, rho, theta)
        )
        z += c * f
    if noise_nm:
        z += rng.normal(0, noise_nm, z.shape)
    z[~inside] = np.nan
    if dropout_fraction:
        idx = np.flatnonzero(inside)
        drop = rng.choice(idx, int(dropout_fraction * idx.size), replace=False)
        z.ravel()[drop] = np.nan
    return SurfaceMap(z, dx_mm, wavelength_nm, centre_rc=centre, radius_px=radius)


def random_coefs(order: int, rng, scale: float = 50.0) -> dict[tuple[int, int], float]:
    return {t: float(rng.normal(0, scale)) for t in zernike.terms_up_to(order)}
