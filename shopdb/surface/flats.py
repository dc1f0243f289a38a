"""Absolute calibration of three flats (the three-flat test).

Measurement model. Two flats X and Y face to face in a Fizeau cavity; each surface's height is
taken positive out of its own substrate and in its own coordinates, as seen when it is the first
(transmission) flat. The second flat is turned over about the flip axis, so the cavity is

    M_XY(x, y) = X(x, y) + Y(flip(x, y)),  flip = (-x, y) about the y axis, (x, -y) about x,

and the rotated measurement turns the first flat A counter-clockwise by the angle a:
``M_AB_rot(x, y) = A(rot_-a(x, y)) + B(flip(x, y))``. Piston and tilt of every map depend on the
alignment and are removed; they are not solved for.

Method 1 — Zernike (after Fritz, Opt. Eng. 23(4), 1984). Each map is fitted with orthonormal
Zernike terms; in coefficient space the flip is diagonal (about y: cos m-theta terms get (-1)^m,
sin terms (-1)^(m+1); about x: cos terms +1, sin terms -1) and the rotation mixes each cos/sin
pair by the angle m·a. The stacked linear system of all measurements (repeats included) is solved
by least squares (SVD pseudo-inverse). Theory: terms with flip factor +1 are fixed by AB, AC, BC
alone; terms with factor -1 have the null vector A = B = C, which the rotated measurement removes
unless m·a is a multiple of 360° (e.g. m = 4, 8 for a = 90°). Such terms are reported as
undetermined (NaN), never as zero; the code finds them from the null space of the system.

Method 2 — pixel-wise along the flip axis (Schulz & Schwider, Appl. Opt. 6, 1967): on the flip
axis the flip is the identity, so the three profiles follow exactly, non-polynomial detail
included: A = (AB + AC - BC)/2, B = (AB - AC + BC)/2, C = (-AB + AC + BC)/2.

Uncertainty. The repeatability sigma of one fitted coefficient is the pooled scatter of repeated
measurements when any are given, else the residual of the over-determined system
(RSS / (equations - rank)); the coefficients' covariance is sigma^2 (G^T G)^+; PV and RMS
uncertainties come from 400 draws of that covariance (a fixed seed, so a calibration is
reproducible).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from shopdb.surface import aperture, zernike
from shopdb.surface.maps import SurfaceMap
from shopdb.surface.orient import flip_factors, rotation_matrix

FLATS = ("A", "B", "C")
MEASUREMENTS = ("ab", "ac", "bc", "ab_rot")
ALIGNMENT = {(0, 0), (1, -1), (1, 1)}  # piston and tilt: set by the alignment, not solved for


@dataclass(frozen=True)
class Registration:
    """How one map's aperture sits against the first map's.

    Notes
    -----
    How well a map's aperture matches the first map's, as the three-flat report states it
    (common practice: the maps must share their pupil for the flats to combine).
    """

    centre_offset_mm: tuple[float, float]  # (x, y) of this map's fitted centre from the AB map's
    radius_change_mm: float
    residual_rms_nm: float  # RMS over the fitted terms of (measured - solved model)


@dataclass(frozen=True)
class FlatsSolution:
    """The three flats solved: coefficients, their uncertainty, maps and profiles.

    Notes
    -----
    Fritz, Opt. Eng. 23(4):379 (1984) for the Zernike solution; Schulz & Schwider, Appl. Opt.
    6:1077 (1967) for the profiles along the flip axis (see the module notes).
    """

    terms: list[tuple[int, int]]
    coefficients: dict[
        str, np.ndarray
    ]  # flat -> coefficient per term (NaN: undetermined/alignment)
    uncertainty: dict[str, np.ndarray]  # flat -> standard uncertainty per term
    undetermined: list[tuple[int, int]]  # terms the measurement set cannot determine (per flat)
    pv_nm: dict[str, float]
    rms_nm: dict[str, float]
    pv_u_nm: dict[str, float]
    rms_u_nm: dict[str, float]
    sigma_nm: float
    sigma_source: str  # "repeats" or "residual"
    registration: dict[str, list[Registration]]
    radius_mm: float
    profiles: dict[str, np.ndarray] = field(default_factory=dict)  # method 2, along the flip axis
    profile_mm: np.ndarray | None = None
    profile_u_nm: float = math.nan
    angle_deg: float = 90.0
    flip_axis: str = "y"

    def error_map(self, flat: str, shape: tuple[int, int], dx_mm: float) -> np.ndarray:
        """The flat's solved surface (determined terms, no piston/tilt) on a centred grid; NaN outside."""
        rows, cols = np.mgrid[: shape[0], : shape[1]]
        r = self.radius_mm / dx_mm
        x = (cols - (shape[1] - 1) / 2) / r
        y = ((shape[0] - 1) / 2 - rows) / r
        rho, theta = np.hypot(x, y), np.arctan2(y, x)
        inside = rho <= 1
        c = np.nan_to_num(self.coefficients[flat])
        z = np.full(shape, np.nan)
        z[inside] = np.tensordot(c, zernike.basis(self.terms, rho[inside], theta[inside]), 1)
        return z

    def coefficient_dict(self, flat: str) -> dict[str, float]:
        """{"n,m": coef_nm} of the determined terms (the calibration record's form)."""
        return {
            f"{n},{m}": float(v)
            for (n, m), v in zip(self.terms, self.coefficients[flat], strict=True)
            if np.isfinite(v)
        }


def _fit(surface: SurfaceMap, terms, radius_px: float | None = None):
    valid = np.isfinite(surface.height_nm)
    (cr, cc), r_fit = aperture.fit_circle(valid)
    r = radius_px or r_fit
    rows, cols = np.nonzero(valid)
    x, y = (cols - cc) / r, (cr - rows) / r
    keep = x * x + y * y <= 1.0
    x, y = x[keep], y[keep]
    z = surface.height_nm[rows[keep], cols[keep]]
    if z.size < 3 * len(terms):
        raise ValueError(
            f"only {z.size} valid pixels in the common aperture for {len(terms)} Zernike terms"
        )
    # piston and tilt are fitted too (the discrete basis is not exactly orthogonal, so leaving
    # the alignment tilt out would leak it into coma) and then dropped
    full = [*sorted(ALIGNMENT), *terms]
    b = zernike.basis(full, np.hypot(x, y), np.arctan2(y, x)).T
    coef, *_ = np.linalg.lstsq(b, z, rcond=None)
    return coef[len(ALIGNMENT) :], (cr, cc), r_fit


def _noise_nm(surface: SurfaceMap) -> float:
    """Pixel noise from second differences along rows (MAD-based, robust to figure)."""
    z = surface.height_nm
    d = z[:, 2:] - 2 * z[:, 1:-1] + z[:, :-2]
    d = d[np.isfinite(d)]
    if d.size < 10:
        return math.nan
    return float(1.4826 * np.median(np.abs(d - np.median(d))) / math.sqrt(6))


def _profile(surface: SurfaceMap, centre, radius_px: float, axis: str):
    """Heights along the flip axis through the centre (nearest pixels), piston and tilt removed."""
    cr, cc = centre
    z = surface.height_nm
    if axis == "y":
        col = round(cc)
        idx = np.arange(z.shape[0])
        pos = (cr - idx) / radius_px
        vals = z[:, col]
    else:
        row = round(cr)
        idx = np.arange(z.shape[1])
        pos = (idx - cc) / radius_px
        vals = z[row, :]
    return pos, vals


def _detilt(pos: np.ndarray, vals: np.ndarray) -> np.ndarray:
    good = np.isfinite(vals)
    out = np.full(vals.shape, np.nan)
    if good.sum() >= 2:
        p = np.polyfit(pos[good], vals[good], 1)
        out[good] = vals[good] - np.polyval(p, pos[good])
    return out


def solve(
    maps: dict[str, list[SurfaceMap]],
    *,
    angle_deg: float = 90.0,
    flip_axis: str = "y",
    order: int = 8,
    seed: int = 0,
) -> FlatsSolution:
    """Solve the three flats from ``maps`` = {"ab": [...], "ac": [...], "bc": [...], "ab_rot": [...]}.

    Lists allow repeated measurements. All maps must share the grid and pixel pitch.

    Notes
    -----
    Fritz, Opt. Eng. 23(4):379 (1984): the stacked linear system in Zernike coefficients solved
    by least squares; undetermined terms from its null space. Schulz & Schwider, Appl. Opt.
    6:1077 (1967) for the profiles (see the module notes).
    """
    missing = [k for k in MEASUREMENTS if not maps.get(k)]
    if missing:
        raise ValueError(f"the three-flat test needs the measurement(s) {', '.join(missing)}")
    unknown = set(maps) - set(MEASUREMENTS)
    if unknown:
        raise ValueError(f"unknown measurement(s) {', '.join(sorted(unknown))}")
    if not math.isfinite(angle_deg) or abs(angle_deg) % 360 == 0:
        raise ValueError(f"rotation angle {angle_deg} must be finite and not a multiple of 360")
    first = maps["ab"][0]
    for key in MEASUREMENTS:
        for mp in maps[key]:
            if mp.height_nm.shape != first.height_nm.shape or not math.isclose(
                mp.dx_mm, first.dx_mm, rel_tol=1e-6
            ):
                raise ValueError(
                    f"measurement {key}: grid {mp.height_nm.shape} at {mp.dx_mm} mm differs from "
                    f"AB's {first.height_nm.shape} at {first.dx_mm} mm"
                )
    terms = [t for t in zernike.terms_up_to(order) if t not in ALIGNMENT]
    k = len(terms)
    # the common aperture: the smallest fitted radius, slightly inside every map's edge
    fits0 = {
        key: [aperture.fit_circle(np.isfinite(mp.height_nm)) for mp in maps[key]] for key in maps
    }
    radius_px = 0.98 * min(r for fl in fits0.values() for _, r in fl)
    f = np.diag(flip_factors(terms, flip_axis))
    rot = rotation_matrix(terms, angle_deg)
    eye, zero = np.eye(k), np.zeros((k, k))
    blocks = {
        "ab": [eye, f, zero],
        "ac": [eye, zero, f],
        "bc": [zero, eye, f],
        "ab_rot": [rot, f, zero],
    }
    rows_g: list[np.ndarray] = []
    rhs: list[np.ndarray] = []
    fitted: dict[str, list] = {}
    centres: dict[str, list] = {}
    for key in MEASUREMENTS:
        fitted[key], centres[key] = [], []
        for mp in maps[key]:
            coef, centre, r_fit = _fit(mp, terms, radius_px)
            fitted[key].append(coef)
            centres[key].append((centre, r_fit))
            rows_g.append(np.hstack(blocks[key]))
            rhs.append(coef)
    g = np.vstack(rows_g)
    y = np.concatenate(rhs)
    u, s, vt = np.linalg.svd(g, full_matrices=False)
    tol = s.max() * max(g.shape) * 1e-10
    rank = int((s > tol).sum())
    pinv = (vt[:rank].T / s[:rank]) @ u[:, :rank].T
    x = pinv @ y
    null = vt[rank:]
    undetermined_idx = (null**2).sum(axis=0) > 1e-8 if null.size else np.zeros(3 * k, bool)
    resid = y - g @ x
    dof = g.shape[0] - rank
    repeats = [np.array(fitted[key]) for key in MEASUREMENTS if len(fitted[key]) > 1]
    if repeats:
        ss = sum(float(((r - r.mean(axis=0)) ** 2).sum()) for r in repeats)
        n_rep = sum((len(r) - 1) * k for r in repeats)
        sigma, source = math.sqrt(ss / n_rep), "repeats"
    elif dof > 0:
        sigma, source = math.sqrt(float(resid @ resid) / dof), "residual"
    else:
        sigma, source = math.nan, "residual"
    cov = sigma**2 * (pinv @ pinv.T)

    und_terms = sorted(
        {terms[i % k] for i in np.flatnonzero(undetermined_idx)},
        key=lambda t: zernike.nm_to_ansi(*t),
    )
    coefficients, uncertainty = {}, {}
    for i, flat in enumerate(FLATS):
        sl = slice(i * k, (i + 1) * k)
        c = x[sl].copy()
        uu = np.sqrt(np.clip(np.diag(cov)[sl], 0, None))
        c[undetermined_idx[sl]] = np.nan
        uu[undetermined_idx[sl]] = np.nan
        coefficients[flat], uncertainty[flat] = c, uu

    # PV / RMS of each solved flat and their uncertainty by sampling the covariance
    grid = np.linspace(-1, 1, 129)
    gx, gy = np.meshgrid(grid, grid)
    inside = gx**2 + gy**2 <= 1
    basis = zernike.basis(
        terms, np.hypot(gx[inside], gy[inside]), np.arctan2(gy[inside], gx[inside])
    )
    rng = np.random.default_rng(seed)
    pv, rms, pv_u, rms_u = {}, {}, {}, {}
    for i, flat in enumerate(FLATS):
        sl = slice(i * k, (i + 1) * k)
        det = ~undetermined_idx[sl]
        c = np.where(det, x[sl], 0.0)
        surf = c @ basis
        pv[flat] = float(surf.max() - surf.min())
        rms[flat] = float(math.sqrt((c**2).sum()))
        c_cov = cov[sl, sl][np.ix_(det, det)]
        if np.all(np.isfinite(c_cov)):
            draws = rng.multivariate_normal(c[det], c_cov, size=400, method="svd")
            s_maps = draws @ basis[det]
            pv_u[flat] = float(np.std(s_maps.max(axis=1) - s_maps.min(axis=1), ddof=1))
            rms_u[flat] = float(np.std(np.sqrt((draws**2).sum(axis=1)), ddof=1))
        else:
            pv_u[flat] = rms_u[flat] = math.nan

    (c0, _r0) = centres["ab"][0]
    registration: dict[str, list[Registration]] = {}
    row = 0
    for key in MEASUREMENTS:
        registration[key] = []
        for centre, r_fit in centres[key]:
            res = resid[row * k : (row + 1) * k]
            registration[key].append(
                Registration(
                    centre_offset_mm=(
                        (centre[1] - c0[1]) * first.dx_mm,
                        (c0[0] - centre[0]) * first.dx_mm,
                    ),
                    radius_change_mm=(r_fit - centres["ab"][0][1]) * first.dx_mm,
                    residual_rms_nm=float(math.sqrt((res**2).sum())),
                )
            )
            row += 1

    # method 2: profiles along the flip axis (first map of each of AB, AC, BC)
    prof = {}
    positions = []
    for key in ("ab", "ac", "bc"):
        centre, _ = centres[key][0]
        p, v = _profile(maps[key][0], centre, radius_px, flip_axis)
        positions.append(p)
        prof[key] = _detilt(p, np.where(np.abs(p) <= 1, v, np.nan))
    pos = positions[0]
    profiles = {
        "A": (prof["ab"] + prof["ac"] - prof["bc"]) / 2,
        "B": (prof["ab"] - prof["ac"] + prof["bc"]) / 2,
        "C": (-prof["ab"] + prof["ac"] + prof["bc"]) / 2,
    }
    noise = float(np.nanmean([_noise_nm(maps[key][0]) for key in ("ab", "ac", "bc")]))
    return FlatsSolution(
        terms=terms,
        coefficients=coefficients,
        uncertainty=uncertainty,
        undetermined=und_terms,
        pv_nm=pv,
        rms_nm=rms,
        pv_u_nm=pv_u,
        rms_u_nm=rms_u,
        sigma_nm=sigma,
        sigma_source=source,
        registration=registration,
        radius_mm=radius_px * first.dx_mm,
        profiles=profiles,
        profile_mm=pos * radius_px * first.dx_mm,
        profile_u_nm=math.sqrt(3) / 2 * noise,
        angle_deg=angle_deg,
        flip_axis=flip_axis,
    )
