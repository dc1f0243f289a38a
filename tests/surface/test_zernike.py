"""Zernike converters, check values, orthonormality, recurrence, annular polynomials."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from shopdb.surface import zernike as z

# ANSI Z80.28 / ISO 24157 single index j = (n(n+2) + m)/2 (shared/REFERENCES.md, [calc]).
ANSI_TABLE = [
    (0, 0),
    (1, -1),
    (1, 1),
    (2, -2),
    (2, 0),
    (2, 2),
    (3, -3),
    (3, -1),
    (3, 1),
    (3, 3),
    (4, -4),
    (4, -2),
    (4, 0),
    (4, 2),
    (4, 4),
]
# Noll, J. Opt. Soc. Am. 66(3):207 (1976), Table 1: j = 1..22.
NOLL_TABLE = [
    (0, 0),
    (1, 1),
    (1, -1),
    (2, 0),
    (2, -2),
    (2, 2),
    (3, -1),
    (3, 1),
    (3, -3),
    (3, 3),
    (4, 0),
    (4, 2),
    (4, -2),
    (4, 4),
    (4, -4),
    (5, 1),
    (5, -1),
    (5, 3),
    (5, -3),
    (5, 5),
    (5, -5),
    (6, 0),
]


def test_ansi_table():
    assert [z.ansi_to_nm(j) for j in range(15)] == ANSI_TABLE
    assert [z.nm_to_ansi(n, m) for n, m in ANSI_TABLE] == list(range(15))


def test_noll_table():
    assert [z.noll_to_nm(j) for j in range(1, 23)] == NOLL_TABLE
    assert [z.nm_to_noll(n, m) for n, m in NOLL_TABLE] == list(range(1, 23))


@given(st.integers(0, 2000))
def test_ansi_noll_round_trip(j):
    n, m = z.ansi_to_nm(j)
    assert z.nm_to_ansi(n, m) == j
    assert z.noll_to_nm(z.nm_to_noll(n, m)) == (n, m)


@pytest.mark.parametrize("bad", [(-1, 0), (2, 1), (1, 3)])
def test_invalid_indices(bad):
    with pytest.raises(ValueError, match="invalid"):
        z.nm_to_ansi(*bad)


@pytest.mark.parametrize(
    "n,m,rho,theta,expected",
    [
        # shared/REFERENCES.md check values, orthonormal normalisation [calc]
        (4, 0, 0.5, 0.0, -0.2795085),
        (4, 0, 0.0, 0.0, 2.2360680),
        (4, 0, 1.0, 0.0, 2.2360680),
        (2, 0, 0.5, 0.0, -0.8660254),
        (3, 1, 0.5, 0.0, -1.7677670),
        (4, 2, 0.5, 0.0, -1.5811388),
    ],
)
def test_check_values(n, m, rho, theta, expected):
    assert z.zernike(n, m, np.array(rho), np.array(theta)) == pytest.approx(expected, abs=5e-8)


def _polar_quadrature(n_r: int = 40, n_t: int = 128):
    """Gauss-Legendre in rho (weight rho) x uniform in theta: exact for polynomials to high order."""
    x, w = np.polynomial.legendre.leggauss(n_r)
    r = (x + 1) / 2
    wr = w / 2 * r
    t = np.arange(n_t) * 2 * np.pi / n_t
    R, T = np.meshgrid(r, t, indexing="ij")
    W = np.outer(wr, np.full(n_t, 2 * np.pi / n_t)) / np.pi  # area-averaged
    return R, T, W


def test_orthonormal_to_order_20():
    """(1/pi) integral over the unit disk of Z_i Z_j = delta_ij, to 1e-10 (ANSI/ISO 24157 normalisation)."""
    R, T, W = _polar_quadrature()
    terms = z.terms_up_to(20)
    B = z.basis(terms, R, T).reshape(len(terms), -1)
    gram = (B * W.ravel()) @ B.T
    assert np.max(np.abs(gram - np.eye(len(terms)))) < 1e-10


def test_recurrence_matches_factorial_formula_to_order_20():
    """Jacobi recurrence vs the explicit sum of shared/REFERENCES.md (Born & Wolf App. VII)."""
    rho = np.linspace(0, 1, 201)
    for n in range(21):
        for m in range(n % 2, n + 1, 2):
            assert np.max(np.abs(z.radial(n, m, rho) - z.radial_factorial(n, m, rho))) < 1e-9, (
                n,
                m,
            )


def test_recurrence_stays_bounded_at_high_order():
    """|R_n^m| <= 1 on [0, 1] and R(1) = 1 (Born & Wolf §9.2.1); n = 60 still holds in float64."""
    rho = np.linspace(0, 1, 5001)
    for n, m in [(40, 0), (60, 2), (61, 1)]:
        r = z.radial(n, m, rho)
        assert np.max(np.abs(r)) <= 1 + 1e-12 and r[-1] == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize(
    "n,m,pv",
    [
        # PV over the full disk of unit-RMS terms (shared/REFERENCES.md, [calc])
        (1, 1, 4.0),
        (2, 0, 2 * math.sqrt(3)),
        (2, 2, 2 * math.sqrt(6)),
        (3, 1, 2 * math.sqrt(8)),
        (3, 3, 2 * math.sqrt(8)),
        (4, 0, 1.5 * math.sqrt(5)),
    ],
)
def test_pv_of_unit_rms_terms(n, m, pv):
    r = np.linspace(0, 1, 801)
    t = np.linspace(0, 2 * np.pi, 1441)
    R, T = np.meshgrid(r, t)
    vals = z.zernike(n, m, R, T)
    assert vals.max() - vals.min() == pytest.approx(pv, rel=1e-5)


def test_rho_squared_is_piston_plus_defocus():
    """rho^2 = (1 + Z(2,0)/sqrt(3)) / 2 (shared/REFERENCES.md, [calc])."""
    rho = np.linspace(0, 1, 11)
    assert np.allclose(rho**2, (1 + z.zernike(2, 0, rho, 0) / math.sqrt(3)) / 2, atol=1e-15)


def test_agrees_with_poppy():
    """Independent implementation: poppy.zernike.zernike (Noll normalisation = orthonormal)."""
    poppy_zernike = pytest.importorskip("poppy.zernike")
    rng = np.random.default_rng(7)
    rho, theta = rng.uniform(0, 1, 500), rng.uniform(-np.pi, np.pi, 500)
    for n, m in z.terms_up_to(10):
        theirs = poppy_zernike.zernike(n, m, rho=rho, theta=theta)
        assert np.allclose(z.zernike(n, m, rho, theta), theirs, atol=1e-10), (n, m)


# --- annular ---------------------------------------------------------------------------------


def test_annular_equals_circle_at_zero_obscuration():
    rng = np.random.default_rng(3)
    rho, theta = rng.uniform(0, 1, 300), rng.uniform(-np.pi, np.pi, 300)
    for n, m in z.terms_up_to(8):
        assert np.allclose(
            z.annular_zernike(n, m, rho, theta, 0.0), z.zernike(n, m, rho, theta), atol=1e-10
        )


@pytest.mark.parametrize("eps", [0.1, 0.33, 0.5])
def test_annular_closed_forms(eps):
    """Mahajan, J. Opt. Soc. Am. 71(1):75 (1981): annular defocus sqrt(3)(2 rho^2 - 1 - eps^2)/(1 - eps^2)
    and primary spherical sqrt(5)(6 rho^4 - 6(1 + eps^2) rho^2 + 1 + 4 eps^2 + eps^4)/(1 - eps^2)^2
    (closed forms from memory; the orthonormality test below checks them independently)."""
    rho = np.linspace(eps, 1, 50)
    e2 = eps * eps
    defocus = math.sqrt(3) * (2 * rho**2 - 1 - e2) / (1 - e2)
    spherical = (
        math.sqrt(5) * (6 * rho**4 - 6 * (1 + e2) * rho**2 + 1 + 4 * e2 + e2 * e2) / (1 - e2) ** 2
    )
    assert np.allclose(z.annular_zernike(2, 0, rho, 0.0, eps), defocus, atol=1e-12)
    assert np.allclose(z.annular_zernike(4, 0, rho, 0.0, eps), spherical, atol=1e-11)


def test_annular_orthonormal_over_annulus():
    eps = 0.35
    x, w = np.polynomial.legendre.leggauss(40)
    r = (1 - eps) / 2 * x + (1 + eps) / 2
    wr = w * (1 - eps) / 2 * r
    n_t = 128
    t = np.arange(n_t) * 2 * np.pi / n_t
    R, T = np.meshgrid(r, t, indexing="ij")
    W = (np.outer(wr, np.full(n_t, 2 * np.pi / n_t)) / (np.pi * (1 - eps**2))).ravel()
    terms = z.terms_up_to(10)
    B = z.annular_basis(terms, R, T, eps).reshape(len(terms), -1)
    assert np.max(np.abs((B * W) @ B.T - np.eye(len(terms)))) < 1e-10
