"""analyze(): fit round trips, cross-check against poppy, ISO 10110-5 quantities, units, bad input."""

from __future__ import annotations

import math

import numpy as np
import pytest

from shopdb.surface import zernike
from shopdb.surface.analysis import analyze, clear_cache
from shopdb.surface.maps import SurfaceMap
from shopdb.surface.settings import AnalysisSettings

from .helpers import grid, random_coefs, synth

RNG = np.random.default_rng(20261201)


def _coefs(result) -> dict[tuple[int, int], float]:
    return {(n, m): c for n, m, c in result.zernike_nm}


@pytest.mark.parametrize("case", ["circular", "annular", "annular-mahajan"])
def test_fit_recovers_random_coefficients_with_dropouts(case):
    """Synthesis from random coefficients (order <= 10), 5 % random dropouts: exact recovery (1e-9 nm)."""
    eps = 0.0 if case == "circular" else 0.3
    annular_basis = case == "annular-mahajan"
    for _ in range(3):
        truth = random_coefs(10, RNG)
        m = synth(
            truth, 160, obscuration=eps, dropout_fraction=0.05, rng=RNG, annular=annular_basis
        )
        settings = AnalysisSettings(
            aperture="circular" if case == "circular" else "annular",
            obscuration_fraction=eps,
            zernike_basis="annular" if annular_basis else "circle",
        )
        got = _coefs(analyze(m, settings))
        assert max(abs(got[t] - c) for t, c in truth.items()) < 1e-9


def test_fit_with_noise_is_within_expected_propagation():
    """White noise sigma on N valid pixels: coefficient errors ~ N(0, sigma^2 (B B^T)^-1); all within 4 sigma."""
    sigma = 2.0
    truth = random_coefs(10, RNG)
    m = synth(truth, 128, dropout_fraction=0.05, rng=RNG, noise_nm=sigma)
    got = _coefs(analyze(m))
    rho, theta, inside, *_ = grid(128)
    valid = inside & np.isfinite(m.height_nm)
    terms = zernike.terms_up_to(10)
    B = zernike.basis(terms, rho[valid], theta[valid])
    cov = sigma**2 * np.linalg.inv(B @ B.T)
    z_scores = [(got[t] - truth[t]) / math.sqrt(cov[i, i]) for i, t in enumerate(terms)]
    assert max(abs(s) for s in z_scores) < 4


def test_downdate_equals_a_fresh_fit():
    """Same grid, different dropouts: the cached, downdated solve equals a cold one."""
    truth = random_coefs(6, RNG)
    a = synth(truth, 96, dropout_fraction=0.02, rng=RNG, noise_nm=1.0)
    b = synth(truth, 96, dropout_fraction=0.08, rng=RNG, noise_nm=1.0)
    analyze(a)  # warms the cache on this grid
    warm = analyze(b)
    clear_cache()
    cold = analyze(b)
    assert np.allclose(
        [c for *_, c in warm.zernike_nm], [c for *_, c in cold.zernike_nm], atol=1e-9
    )
    assert warm.rms_nm == pytest.approx(cold.rms_nm, abs=1e-9)


@pytest.mark.parametrize(("order", "npix", "tol_nm"), [(6, 150, 1e-9), (20, 240, 1e-8)])
def test_separable_basis_keeps_the_nanometre(order, npix, tol_nm):
    """The cached basis is held in a separable (interpolated) form, whose rounding grows with
    the radial order. With 5 um of tilt on a 2 nm-noise surface, coefficients and PVr must agree
    with a float64 least-squares solution (numpy.linalg.lstsq on the basis evaluated at the
    valid pixels) far below a nanometre, up to order 20 (231 terms); the PVr residual comes from
    quadratic forms, where z.z - c.(B z) would cancel badly (common practice: never form a
    small residual as a difference of huge sums)."""
    truth = random_coefs(6, RNG)
    truth[(1, 1)] = 5000.0 / 2  # Z(1,1) = 2 x: 5 um edge to centre
    m = synth(truth, npix, dropout_fraction=0.03, rng=RNG, noise_nm=2.0)
    clear_cache()
    ours = analyze(m, AnalysisSettings(zernike_order=order, pvr_order=6))
    rho, theta, inside, *_ = grid(npix)
    valid = inside & np.isfinite(m.height_nm)
    terms = zernike.terms_up_to(order)
    B = zernike.basis(terms, rho[valid], theta[valid]).T
    c64, *_ = np.linalg.lstsq(B, m.height_nm[valid], rcond=None)
    err = max(abs(a - b) for (*_, a), b in zip(ours.zernike_nm, c64, strict=True))
    assert err < tol_nm
    k = len(zernike.terms_up_to(6))
    c_pvr, *_ = np.linalg.lstsq(B[:, :k], m.height_nm[valid], rcond=None)
    resid = m.height_nm[valid] - B[:, :k] @ c_pvr
    fit_shown = B[:, 3:k] @ c_pvr[3:]  # piston and tilt removed
    pvr64 = np.ptp(fit_shown) + 3 * math.sqrt(np.mean(resid**2))
    assert ours.pvr_nm == pytest.approx(pvr64, abs=tol_nm)


def test_fit_agrees_with_poppy():
    """Independent library: poppy.zernike.decompose_opd_nonorthonormal_basis on the same sampled map.

    poppy's grid has y down the rows and rho = 1 at the edge pixel centres; ours has y up the
    image, so sin (m < 0) terms change sign. Both fits are least squares on the same pixels.
    """
    pz = pytest.importorskip("poppy.zernike")
    npix = 128
    truth_noll = RNG.normal(0, 20, 36)
    basis = pz.zernike_basis_faster(nterms=36, npix=npix, outside=np.nan)
    opd = np.einsum("i,ijk->jk", truth_noll, basis)
    opd[RNG.random(opd.shape) < 0.05] = np.nan
    aperture = np.isfinite(opd).astype(float)
    theirs = pz.decompose_opd_nonorthonormal_basis(
        np.nan_to_num(opd), aperture=aperture, nterms=36, iterations=30
    )
    c = (npix - 1) / 2
    ours = _coefs(
        analyze(
            SurfaceMap(opd, 0.1, 632.8, centre_rc=(c, c), radius_px=c),
            AnalysisSettings(zernike_order=7),
        )
    )
    for j in range(1, 37):
        n, m = zernike.noll_to_nm(j)
        sign = -1 if m < 0 else 1
        assert ours[(n, m)] == pytest.approx(sign * theirs[j - 1], abs=1e-6), (j, n, m)
        assert ours[(n, m)] == pytest.approx(sign * truth_noll[j - 1], abs=1e-8)


def test_iso10110_quantities_of_a_known_surface():
    """Defocus + primary spherical + astigmatism on a full disk (orthonormal terms, so each quantity
    is known in closed form; definitions per ISO 14999-4 / ISO 10110-5, PV values shared/REFERENCES.md)."""
    c20, c40, c22 = 30.0, 8.0, 5.0
    m = synth({(2, 0): c20, (4, 0): c40, (2, 2): c22, (1, 1): 40.0}, 257)
    r = analyze(m, AnalysisSettings(zernike_order=6))
    # the best-fit sphere is fitted alone; on a pixelated disk Z(2,0) and Z(4,0) are orthogonal only
    # to ~1e-3, so spherical leaks that much into the sag
    assert r.sag_nm == pytest.approx(2 * math.sqrt(3) * c20, rel=2e-3)
    assert r.rsi_nm == pytest.approx(1.5 * math.sqrt(5) * c40, rel=1e-6)
    assert r.rmst_nm == pytest.approx(
        math.sqrt(c20**2 + c40**2 + c22**2), rel=2e-3
    )  # pixel sampling
    assert r.rmsi_nm == pytest.approx(math.sqrt(c40**2 + c22**2), rel=2e-3)
    assert r.rmsa_nm == pytest.approx(c22, rel=2e-3)
    # irregularity: PV of spherical + astigmatism after the best-fit sphere, on a fine polar grid
    rr, tt = np.meshgrid(np.linspace(0, 1, 600), np.linspace(0, 2 * np.pi, 720))
    irr = c40 * zernike.zernike(4, 0, rr, tt) + c22 * zernike.zernike(2, 2, rr, tt)
    assert r.irregularity_nm == pytest.approx(irr.max() - irr.min(), rel=5e-3)
    fr = r.as_dict()["iso10110_fringes"]
    assert fr["sag_fr"] == pytest.approx(r.sag_nm / (632.8 / 2))  # one fringe = lambda/2 of surface


def test_sphere_sag_gives_power():
    """A sphere of radius R over semi-aperture a has sag a^2/(2R) (paraxial); power = 2 sqrt(3) c(2,0)
    (shared/REFERENCES.md) — the best-fit sphere's sag deviation equals the sag difference."""
    npix, dx = 201, 0.5
    c = (npix - 1) / 2
    r_mm = 20000.0
    rows, cols = np.mgrid[:npix, :npix]
    h2 = ((rows - c) ** 2 + (cols - c) ** 2) * dx * dx
    sag = r_mm - np.sqrt(r_mm**2 - h2)  # exact sphere, in mm
    z = np.where(h2 <= (c * dx) ** 2, sag * 1e6, np.nan)
    r = analyze(SurfaceMap(z, dx, 632.8, centre_rc=(c, c), radius_px=c))
    a = c * dx
    assert r.sag_nm == pytest.approx((r_mm - math.sqrt(r_mm**2 - a * a)) * 1e6, rel=1e-4)
    assert r.irregularity_nm < 0.01 * abs(r.sag_nm)  # a sphere has (almost) no irregularity


def test_remove_power_and_piston_tilt():
    m = synth({(0, 0): 100.0, (1, -1): 50.0, (2, 0): 20.0, (3, 1): 4.0}, 129)
    pt = analyze(m)
    ptp = analyze(m, AnalysisSettings(remove=("piston", "tilt", "power")))
    assert pt.rms_nm == pytest.approx(math.hypot(20, 4), rel=5e-3)
    assert ptp.rms_nm == pytest.approx(4.0, rel=5e-3)
    assert ptp.pv_nm == pytest.approx(
        2 * math.sqrt(8) * 4, rel=2e-2
    )  # coma PV, shared/REFERENCES.md


def test_pvr_is_fit_pv_plus_three_residual_rms():
    """Evans 2009: PVr = PV(fit) + 3 RMS(residual). A smooth map plus white noise sigma: the
    residual RMS tends to sigma, the fit PV to the smooth map's PV; a single spike barely moves PVr."""
    sigma = 1.5
    m = synth({(2, 2): 10.0}, 201, noise_nm=sigma, rng=RNG)
    r = analyze(m)
    smooth_pv = 2 * math.sqrt(6) * 10.0
    assert r.pvr_terms == 36
    assert r.pvr_nm == pytest.approx(smooth_pv + 3 * sigma, rel=0.03)
    h = m.height_nm.copy()
    h[100, 60] += 500.0  # a dust spike
    spiked = analyze(
        SurfaceMap(h, m.dx_mm, m.wavelength_nm, centre_rc=m.centre_rc, radius_px=m.radius_px)
    )
    assert spiked.pv_nm > r.pv_nm + 400
    assert spiked.pvr_nm < r.pvr_nm + 10


def test_outlier_filter_removes_a_spike():
    m = synth({(2, 2): 10.0}, 129, noise_nm=0.5, rng=RNG)
    h = m.height_nm.copy()
    h[64, 30] += 300.0
    spiked = SurfaceMap(h, m.dx_mm, m.wavelength_nm, centre_rc=m.centre_rc, radius_px=m.radius_px)
    r = analyze(spiked, AnalysisSettings(outlier_sigma=8))
    assert r.outliers_removed >= 1 and r.pv_nm < 2 * math.sqrt(6) * 10 + 10


def test_slopes_of_a_tilt():
    """A pure tilt of slope s (nm/mm = microradian) has slope RMS = max = s before tilt removal."""
    npix, dx = 101, 0.2
    c = (npix - 1) / 2
    cols = np.arange(npix)[None, :] * np.ones((npix, 1))
    z = 30.0 * cols * dx  # 30 nm/mm
    rows = np.arange(npix)[:, None]
    z = np.where((rows - c) ** 2 + (cols - c) ** 2 <= c * c, z, np.nan)
    r = analyze(
        SurfaceMap(z, dx, 632.8, centre_rc=(c, c), radius_px=c),
        AnalysisSettings(remove=("piston",)),
    )
    assert r.slope_rms_urad == pytest.approx(30.0, rel=1e-9)
    assert r.slope_max_urad == pytest.approx(30.0, rel=1e-9)


def test_fringes_waves_um_and_wavefront_factor():
    """One fringe (double pass) = lambda/2 of surface = lambda of reflected wavefront (ISO 14999-4)."""
    ones = np.ones((4, 4))
    lam = 632.8
    assert (
        SurfaceMap.from_array(ones, units="fringes", dx_mm=1, wavelength_nm=lam).height_nm[0, 0]
        == lam / 2
    )
    assert (
        SurfaceMap.from_array(ones, units="waves", dx_mm=1, wavelength_nm=lam).height_nm[0, 0]
        == lam
    )
    assert (
        SurfaceMap.from_array(ones, units="um", dx_mm=1, wavelength_nm=lam).height_nm[0, 0] == 1000
    )
    wf = SurfaceMap.from_array(ones, units="fringes", dx_mm=1, wavelength_nm=lam, kind="wavefront")
    assert wf.height_nm[0, 0] == lam
    assert wf.to_surface().height_nm[0, 0] == lam / 2 and wf.to_surface().kind == "surface"
    assert wf.to_surface().to_wavefront().height_nm[0, 0] == lam


def test_settings_hash_is_stable_and_round_trips():
    s = AnalysisSettings(remove=("tilt", "piston"), zernike_order=8, pvr_order=6)
    assert s == AnalysisSettings(zernike_order=8, pvr_order=6) and hash(s) == hash(
        AnalysisSettings(zernike_order=8, pvr_order=6)
    )
    assert AnalysisSettings.from_dict(s.as_dict()) == s
    assert s.digest == AnalysisSettings.from_dict(s.as_dict()).digest
    assert s.digest != AnalysisSettings().digest
    # known value: the canonical JSON of the defaults hashes the same across runs
    assert len(AnalysisSettings().digest) == 64


@pytest.mark.parametrize(
    "make,message",
    [
        (lambda: SurfaceMap(np.full((8, 8), np.nan), 0.1, 632.8), "no valid pixels"),
        (lambda: SurfaceMap(np.zeros((1, 50)), 0.1, 632.8), "at least 2 x 2"),
        (
            lambda: SurfaceMap(np.zeros((8, 8)), float("inf"), 632.8),
            "pixel pitch dx_mm must be a positive finite",
        ),
        (
            lambda: SurfaceMap(np.zeros((8, 8)), -0.1, 632.8),
            "pixel pitch dx_mm must be a positive finite",
        ),
        (lambda: SurfaceMap(np.zeros((8, 8)), 0.1, 0.0), "wavelength_nm must be a positive finite"),
        (lambda: SurfaceMap(np.zeros((8, 8)), 0.1, 632.8, kind="phase"), "kind 'phase'"),
        (lambda: SurfaceMap(np.zeros((8, 8, 2)), 0.1, 632.8), "must be 2-D"),
        (
            lambda: SurfaceMap.from_array(np.zeros((8, 8)), units="fringes", dx_mm=0.1),
            "need the test wavelength",
        ),
        (
            lambda: SurfaceMap.from_array(
                np.zeros((8, 8)), units="mils", dx_mm=0.1, wavelength_nm=632.8
            ),
            "units 'mils'",
        ),
    ],
)
def test_bad_maps(make, message):
    with pytest.raises(ValueError, match=message):
        analyze(make())


def test_too_few_valid_pixels_for_the_terms():
    m = synth({(2, 0): 1.0}, 12)
    with pytest.raises(ValueError, match="valid pixels in the clear aperture: at least 198"):
        analyze(m, AnalysisSettings(zernike_order=10))


@pytest.mark.parametrize(
    "kw,message",
    [
        ({"remove": ("coma",)}, "cannot remove"),
        ({"zernike_order": 0}, "Zernike order must be"),
        ({"pvr_order": 12}, "PVr order must be"),
        ({"zernike_basis": "annular"}, "need an annular aperture"),
        ({"psd_band_edges_per_mm": (0.5, 0.1)}, "must increase"),
        ({"psd_window": "blackman"}, "PSD window"),
    ],
)
def test_bad_settings(kw, message):
    with pytest.raises(ValueError, match=message):
        AnalysisSettings(**kw)


def test_aperture_is_fitted_when_not_given():
    """No centre given: the circle fit on the valid region finds the part (to a fraction of a pixel)."""
    z = np.full((140, 150), np.nan)
    rows, cols = np.mgrid[:140, :150]
    inside = (rows - 70.3) ** 2 + (cols - 80.6) ** 2 <= 50**2
    z[inside] = 5.0 * (cols[inside] - 80.6) * 0.1
    z[inside & (RNG.random(z.shape) < 0.05)] = np.nan  # dropouts do not bias the fit
    r = analyze(SurfaceMap(z, 0.1, 632.8))
    assert r.aperture_centre_rc == pytest.approx((70.3, 80.6), abs=0.3)
    assert r.aperture_radius_mm == pytest.approx(5.0, abs=0.05)
    assert r.valid_fraction == pytest.approx(0.95, abs=0.01)


@pytest.mark.parametrize("obscured, specks", [(False, 0), (True, 0), (False, 30), (True, 30)])
def test_circle_fit_ignores_holes_and_specks(obscured, specks):
    """Kasa's algebraic circle fit (IEEE Trans. Instrum. Meas. 25(1):8, 1976) on the outermost
    valid pixels, specks outside the part rejected: a disc drawn from its exact centre and radius
    (pixel centres inside) is recovered to 0.15 px."""
    from shopdb.surface.aperture import fit_circle

    n = 301
    rows, cols = np.mgrid[:n, :n]
    d2 = (rows - 148.37) ** 2 + (cols - 152.81) ** 2
    valid = d2 <= 131.4**2
    if obscured:
        valid &= d2 >= 40.0**2
    valid[RNG.integers(0, n, specks), RNG.integers(0, n, specks)] = True
    (rc, cc), radius = fit_circle(valid)
    assert (rc, cc) == pytest.approx((148.37, 152.81), abs=0.15)
    assert radius == pytest.approx(131.4, abs=0.15)


def test_circle_fit_refuses_a_region_that_is_not_a_circle():
    valid = np.zeros((200, 300), bool)
    rows, cols = np.mgrid[:200, :300]
    valid |= (rows - 100) ** 2 + (cols - 70) ** 2 <= 60**2
    valid |= (rows - 100) ** 2 + (cols - 230) ** 2 <= 60**2
    with pytest.raises(ValueError, match="not a circle"):
        analyze(SurfaceMap(np.where(valid, 1.0, np.nan), 0.1, 632.8))


def test_clear_aperture_fraction_and_diameter():
    m = synth({(2, 0): 10.0}, 201, dx_mm=0.5)
    half = analyze(m, AnalysisSettings(clear_aperture_fraction=0.5))
    by_mm = analyze(m, AnalysisSettings(clear_aperture_mm=50.0))
    assert half.aperture_radius_mm == pytest.approx(25.0) == by_mm.aperture_radius_mm
    # a quadratic over half the radius has a quarter of the sag
    assert half.sag_nm == pytest.approx(analyze(m).sag_nm / 4, rel=1e-6)
