"""Three-flat test on synthetic flats with known surfaces.

Truth: three flats with random Zernike content to radial order 8 plus a small non-polynomial part
(Gaussian bumps), measured face to face with one flat turned over and one rotated, with noise.
Checks: the recovered coefficients agree with each flat's own projection within the propagated
uncertainty; the undetermined terms are exactly those the theory names (Fritz, Opt. Eng. 23(4),
1984: a term whose sign flips under the turn-over and which the rotation leaves unchanged,
m * angle = 0 mod 360, cannot be separated); an independent least-squares solve written here on
the stacked pixel data gives the same coefficients; the flip-axis profiles (Schulz & Schwider
1967) recover the flats, non-polynomial detail included.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from shopdb.surface import zernike
from shopdb.surface.flats import ALIGNMENT, solve
from shopdb.surface.maps import SurfaceMap

N, R_PX, DX = 128, 60.0, 0.5
C0 = (N - 1) / 2
TERMS = [t for t in zernike.terms_up_to(8) if t not in ALIGNMENT]


def _flat(seed):
    rng = np.random.default_rng(seed)
    coefs = {t: rng.normal(0, 6.0 / (1 + t[0])) for t in TERMS}
    bumps = [
        (rng.uniform(-0.6, 0.6), rng.uniform(-0.6, 0.6), rng.uniform(0.3, 0.6)) for _ in range(3)
    ]

    def height(x, y):
        rho, th = np.hypot(x, y), np.arctan2(y, x)
        z = sum(c * zernike.zernike(n, m, rho, th) for (n, m), c in coefs.items())
        for bx, by, amp in bumps:  # non-polynomial: narrow Gaussian bumps
            z = z + amp * np.exp(-((x - bx) ** 2 + (y - by) ** 2) / (2 * 0.05**2))
        return z

    return height


FLATS = {"A": _flat(1), "B": _flat(2), "C": _flat(3)}
ROWS, COLS = np.mgrid[:N, :N]
X, Y = (COLS - C0) / R_PX, (C0 - ROWS) / R_PX
INSIDE = X**2 + Y**2 <= 1


def _flip(x, y, axis):
    return (-x, y) if axis == "y" else (x, -y)


def _rot(x, y, deg):
    """Where a point of a surface turned counter-clockwise by ``deg`` came from."""
    a = math.radians(deg)
    return x * math.cos(a) + y * math.sin(a), -x * math.sin(a) + y * math.cos(a)


def _measure(first, second, axis, *, angle=0.0, noise=0.2, seed=0):
    fx, fy = _rot(X, Y, angle) if angle else (X, Y)
    sx, sy = _flip(X, Y, axis)
    z = FLATS[first](fx, fy) + FLATS[second](sx, sy)
    z = z + np.random.default_rng(seed).normal(0, noise, z.shape)
    z = z + 30 * X - 12 * Y + 5  # alignment tilt and piston
    return SurfaceMap(np.where(INSIDE, z, np.nan), DX, 632.8)


def _maps(axis="y", angle=90.0, repeats=1):
    return {
        "ab": [_measure("A", "B", axis, seed=10 + r) for r in range(repeats)],
        "ac": [_measure("A", "C", axis, seed=20 + r) for r in range(repeats)],
        "bc": [_measure("B", "C", axis, seed=30 + r) for r in range(repeats)],
        "ab_rot": [_measure("A", "B", axis, angle=angle, seed=40 + r) for r in range(repeats)],
    }


def _theory_undetermined(axis, angle):
    out = set()
    for n, m in TERMS:
        sign = ((-1) ** m if m >= 0 else (-1) ** (-m + 1)) if axis == "y" else (-1 if m < 0 else 1)
        if sign < 0 and (abs(m) * angle) % 360 == 0:
            out.add((n, m))
    return out


def _projection(flat, radius_mm):
    """Each true flat's own least-squares Zernike coefficients over the solver's aperture."""
    r = radius_mm / DX / R_PX
    keep = r * r >= X**2 + Y**2
    x, y = X[keep] / r, Y[keep] / r
    b = zernike.basis(TERMS, np.hypot(x, y), np.arctan2(y, x)).T
    z = FLATS[flat](X[keep], Y[keep])
    b_full = np.hstack([b, np.ones((b.shape[0], 1)), x[:, None], y[:, None]])
    return np.linalg.lstsq(b_full, z, rcond=None)[0][: len(TERMS)]


@pytest.mark.parametrize("axis,angle", [("y", 90.0), ("x", 90.0), ("y", 60.0)])
def test_undetermined_terms_are_those_of_the_theory(axis, angle):
    sol = solve(_maps(axis, angle), angle_deg=angle, flip_axis=axis)
    assert set(sol.undetermined) == _theory_undetermined(axis, angle)
    for flat in "ABC":
        idx = [sol.terms.index(t) for t in sol.undetermined]
        assert np.all(np.isnan(sol.coefficients[flat][idx]))  # reported, never zero


@pytest.mark.parametrize("repeats", [1, 3])
def test_recovered_within_the_propagated_uncertainty(repeats):
    sol = solve(_maps(repeats=repeats), angle_deg=90.0, flip_axis="y")
    assert sol.sigma_source == ("repeats" if repeats > 1 else "residual")
    for flat in "ABC":
        truth = _projection(flat, sol.radius_mm)
        got, u = sol.coefficients[flat], sol.uncertainty[flat]
        det = np.isfinite(got)
        z = np.abs(got[det] - truth[det]) / u[det]
        assert np.all(u[det] > 0) and np.all(u[det] < 0.5)
        assert z.max() < 5, (flat, z.max())
        assert np.sqrt(np.mean(z**2)) < 2.0  # the uncertainty is realistic, not inflated
    for key, regs in sol.registration.items():
        for reg in regs:  # the synthetic maps are registered: offsets below a tenth of a pixel
            assert max(map(abs, reg.centre_offset_mm)) < 0.1 * DX, key


def test_agrees_with_an_independent_pixel_domain_solve():
    axis, angle = "y", 90.0
    maps = _maps(axis, angle)
    sol = solve(maps, angle_deg=angle, flip_axis=axis)
    # stacked pixel system: A, B, C coefficients plus piston/tilt per map, built from coordinates
    r = sol.radius_mm / DX / R_PX
    keep = (r * r >= X**2 + Y**2).ravel()
    x, y = X.ravel()[keep] / r, Y.ravel()[keep] / r
    k = len(TERMS)

    def basis_at(px, py):
        return zernike.basis(TERMS, np.hypot(px, py), np.arctan2(py, px)).T

    first = {"ab": "A", "ac": "A", "bc": "B", "ab_rot": "A"}
    second = {"ab": "B", "ac": "C", "bc": "C", "ab_rot": "B"}
    blocks, rhs = [], []
    for j, key in enumerate(["ab", "ac", "bc", "ab_rot"]):
        g = np.zeros((x.size, 3 * k + 12))
        fx, fy = _rot(x, y, angle) if key == "ab_rot" else (x, y)
        i1, i2 = "ABC".index(first[key]), "ABC".index(second[key])
        g[:, i1 * k : (i1 + 1) * k] += basis_at(fx, fy)
        g[:, i2 * k : (i2 + 1) * k] += basis_at(*_flip(x, y, axis))
        g[:, 3 * k + 3 * j : 3 * k + 3 * j + 3] = np.column_stack([np.ones_like(x), x, y])
        blocks.append(g)
        rhs.append(maps[key][0].height_nm.ravel()[keep])
    sol_ref = np.linalg.lstsq(np.vstack(blocks), np.concatenate(rhs), rcond=None)[0]
    for i, flat in enumerate("ABC"):
        ours = sol.coefficients[flat]
        det = np.isfinite(ours)
        np.testing.assert_allclose(ours[det], sol_ref[i * k : (i + 1) * k][det], atol=0.02)


def test_flip_axis_profiles_recover_the_flats_with_their_fine_detail():
    sol = solve(_maps(), angle_deg=90.0, flip_axis="y")
    pos = sol.profile_mm / DX / R_PX  # normalised y along the flip axis (x = 0)
    col_x = (round(C0) - C0) / R_PX
    for flat in "ABC":
        truth = FLATS[flat](np.full_like(pos, col_x), pos)
        got = sol.profiles[flat]
        good = np.isfinite(got)
        p = np.polyfit(pos[good], truth[good], 1)  # the profiles are given without piston/tilt
        diff = got[good] - (truth[good] - np.polyval(p, pos[good]))
        assert np.sqrt(np.mean(diff**2)) < 3 * sol.profile_u_nm
        assert 0.1 < sol.profile_u_nm < 0.3  # ~ sqrt(3)/2 of the 0.2 nm pixel noise


def test_bad_inputs_are_refused():
    maps = _maps()
    with pytest.raises(ValueError, match="needs the measurement"):
        solve({k: v for k, v in maps.items() if k != "ab_rot"})
    with pytest.raises(ValueError, match="not a multiple of 360"):
        solve(maps, angle_deg=0.0)
    with pytest.raises(ValueError, match="flip axis"):
        solve(maps, flip_axis="z")
    small = SurfaceMap(np.zeros((64, 64)), DX, 632.8)
    with pytest.raises(ValueError, match="differs from AB"):
        solve({**maps, "bc": [small]})
