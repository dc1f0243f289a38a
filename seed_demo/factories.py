"""Builders shared by the demo shop and the tests: synthetic maps and a minimal shop."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np

from shopdb.services import masterdata as md
from shopdb.surface import zernike
from shopdb.surface.maps import SurfaceMap


def disk_map(
    coefs: dict[tuple[int, int], float],
    *,
    npix: int = 128,
    diameter_mm: float = 100.0,
    wavelength_nm: float = 632.8,
    noise_nm: float = 0.0,
    rng: np.random.Generator | None = None,
    fill: float = 0.96,
) -> SurfaceMap:
    """A circular part filling ``fill`` of a square grid, heights from orthonormal Zernike coefficients."""
    c = (npix - 1) / 2
    radius = fill * npix / 2
    rows, cols = np.mgrid[:npix, :npix]
    x, y = (cols - c) / radius, (c - rows) / radius
    rho, theta = np.hypot(x, y), np.arctan2(y, x)
    z = np.zeros((npix, npix))
    for (n, m), v in coefs.items():
        z += v * zernike.zernike(n, m, rho, theta)
    if noise_nm:
        z += (rng or np.random.default_rng(0)).normal(0, noise_nm, z.shape)
    z[rho > 1] = np.nan
    return SurfaceMap(z, diameter_mm / (2 * radius), wavelength_nm)


def basic_shop(
    session,
    admin,
    *,
    requires_reference: bool = True,
    station_profile: dict | None = None,
    calibrated_at: datetime | None = None,
    valid_days: int = 90,
) -> dict:
    """One drawing, lot, part, machine, reference flat with a calibration, and a station."""
    drawing = md.add_drawing(
        session=session,
        actor=admin,
        number="KR-100-W",
        revision="B",
        surface_form_callout="3/0.5(0.1/0.05); λ = 632.8 nm",
        test_wavelength_nm=632.8,
        clear_aperture_mm=90.0,
        title="100 mm plano window",
    )
    lot = md.add_lot(session=session, actor=admin, code="L-0001", drawing_id=drawing.id)
    part = md.add_part(
        session=session, actor=admin, serial="W-0001", drawing_id=drawing.id, lot_id=lot.id
    )
    machine = md.add_machine(session=session, actor=admin, name="Polisher A", kind="pitch lap")
    ref = md.add_reference(session=session, actor=admin, name="TF-1", diameter_mm=150.0)
    at = calibrated_at or datetime(2026, 1, 1, tzinfo=UTC)
    cal = md.add_calibration(
        session=session,
        actor=admin,
        reference_id=ref.id,
        calibrated_at=at,
        valid_until=at + timedelta(days=valid_days),
        method="three-flat",
        uncertainty_nm=1.0,
        coefficients={"2,0": 3.0, "2,2": 1.0},
    )
    profile = {"reference": "TF-1", "dx_mm": None, **(station_profile or {})}
    profile = {k: v for k, v in profile.items() if v is not None}
    station = md.add_station(
        session=session,
        actor=admin,
        name="Bench 1",
        wavelength_nm=632.8,
        requires_reference=requires_reference,
        profile=profile,
    )
    return {
        "drawing": drawing,
        "lot": lot,
        "part": part,
        "machine": machine,
        "reference": ref,
        "calibration": cal,
        "station": station,
    }
