"""A station's reference optic at ingest: the calibration in force, and its subtraction."""

from __future__ import annotations

from dataclasses import replace
from datetime import datetime

import numpy as np
from sqlmodel import Session

from shopdb import models as m
from shopdb.blobs import BlobStore
from shopdb.errors import ShopdbError
from shopdb.profile import StationProfile
from shopdb.services.lookups import calibration_in_force, get_by
from shopdb.surface import zernike
from shopdb.surface.analysis import resolve_aperture
from shopdb.surface.maps import SurfaceMap
from shopdb.surface.orient import orient_coefficients, orient_map
from shopdb.surface.settings import AnalysisSettings


def calibration_for(
    session: Session, station: m.Station, profile: StationProfile, when: datetime
) -> m.ReferenceCalibration | None:
    """The calibration of the station's reference in force at ``when``; refused when the station
    requires a valid one and has none."""
    if not profile.reference:
        if station.requires_reference:
            raise ShopdbError(
                f"station {station.name} requires a reference but its profile names none"
            )
        return None
    try:
        ref = get_by(session, m.ReferenceOptic, "name", profile.reference, "reference optic")
    except ShopdbError:
        raise ShopdbError(
            f"station {station.name} names reference {profile.reference!r}, which does not exist"
        ) from None
    cal = calibration_in_force(session, ref.id, when)
    if station.requires_reference and (cal is None or cal.valid_until < when):
        state = (
            "has no calibration"
            if cal is None
            else f"calibration expired {cal.valid_until:%Y-%m-%d}"
        )
        raise ShopdbError(f"reference {ref.name} {state} at {when:%Y-%m-%d %H:%M} UTC")
    return cal


def subtract_calibration(
    surface: SurfaceMap,
    cal: m.ReferenceCalibration,
    blobs: BlobStore,
    settings: AnalysisSettings,
    *,
    flip: str = "none",
    rotate_deg: int = 0,
) -> SurfaceMap:
    """Remove the reference's own error: its error map when it matches the grid, else its Zernike
    coefficients synthesised over the map's clear aperture.

    The calibration is in the reference's own coordinates; ``flip`` and ``rotate_deg`` (the
    station profile's ``reference_flip`` / ``reference_rotate_deg``) turn it the way it appears
    in the station's oriented maps — e.g. a station that flips its maps to bring the part to its
    datum shows the reference flipped too."""
    if cal.error_map_blob:
        err = blobs.get(cal.error_map_blob).astype(np.float64)
        if err.shape == surface.shape:
            err = orient_map(err, flip=flip, rotate_deg=rotate_deg)
            if err.shape == surface.shape:
                return replace(surface, height_nm=surface.height_nm - err)
    if not cal.coefficients:
        raise ShopdbError(
            f"reference calibration {cal.id} has neither a matching error map nor coefficients"
        )
    geom = resolve_aperture(surface, settings)
    rho, theta = geom.polar()
    ref = np.zeros(rho.shape)
    for key, c in orient_coefficients(cal.coefficients, flip=flip, rotate_deg=rotate_deg).items():
        ref += c * zernike.zernike(*zernike.parse_key(key), rho, theta)
    h = np.full(surface.shape, np.nan)
    h[geom.mask] = surface.height_nm[geom.mask] - ref
    return replace(surface, height_nm=h, centre_rc=geom.centre_rc, radius_px=geom.radius_px)
