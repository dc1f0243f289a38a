"""Phase retrieval and unwrapping against synthetic interferograms of a known surface."""

from __future__ import annotations

import numpy as np
import pytest

from shopdb.formats import Metadata, read_map
from shopdb.surface import phase as ph

RNG = np.random.default_rng(8)
LAM = 632.8


def _surface(n=96):
    r, c = np.mgrid[:n, :n]
    x, y = (c - n / 2) / (n / 2), (r - n / 2) / (n / 2)
    h = (
        150 * (x**2 + y**2) + 40 * x * y - 30 * y
    )  # nm of surface: several fringes, needs unwrapping
    return h, r, c


def _frames(h, deltas, *, noise=0.0, a=100.0, b=60.0, carrier=0.0, dropouts=None):
    phi = 4 * np.pi * h / LAM + carrier
    out = np.array([a + b * np.cos(phi + d) for d in deltas])
    if dropouts is not None:
        out[:, dropouts] = a  # no fringe contrast there (dust, edge)
    return out + RNG.normal(0, noise, out.shape) if noise else out


def _rms_err(h_est, h_true, valid):
    e = (h_est - h_true)[valid]
    return float(np.sqrt(np.mean((e - e.mean()) ** 2)))


@pytest.mark.parametrize(
    "algorithm,deltas",
    [
        ("lsq", np.arange(6) * np.pi / 3),  # 6 steps of 60 degrees, Greivenkamp 1984
        ("hariharan5", np.array([-1, -0.5, 0, 0.5, 1]) * np.pi),
        ("carre", np.array([-3, -1, 1, 3]) * 0.7),  # any step: Carre does not need it
    ],
)
def test_phase_shifting_recovers_the_surface_with_noise_and_dropouts(algorithm, deltas):
    h, r, c = _surface()
    drop = (r - 30) ** 2 + (c - 60) ** 2 < 36  # a dust spot
    f = _frames(h, deltas, noise=0.5, dropouts=drop)
    unwrapped, _ = ph.retrieve(
        f, algorithm=algorithm, steps_rad=deltas if algorithm == "lsq" else None
    )
    est = ph.phase_to_height_nm(unwrapped, LAM)
    valid = np.isfinite(est)
    assert not valid[drop].any()  # low modulation -> no data
    assert valid.sum() > 0.95 * (~drop).sum()
    # noise 0.5 counts on 60 counts modulation: ~1 % -> a few mrad -> well under 1 nm
    assert _rms_err(est, h, valid) < 0.5


def test_fourier_transform_method_with_a_tilt_carrier():
    h, r, c = _surface(128)
    h = h * 0.3  # the Fourier method needs the local fringe frequency to stay near the carrier
    carrier = 2 * np.pi * (0.2 * c + 0.07 * r)
    f = _frames(h, [0.0], carrier=carrier, noise=0.2)
    wrapped, _, _ = ph.fourier_transform(f[0])
    est = ph.phase_to_height_nm(ph.unwrap(wrapped), LAM)
    e = est - h
    A = np.column_stack([np.ones(e.size), r.ravel(), c.ravel()])
    e = e - (A @ np.linalg.lstsq(A, e.ravel(), rcond=None)[0]).reshape(
        e.shape
    )  # carrier residue = tilt
    inner = (slice(12, -12), slice(12, -12))  # the method rings at the frame edges (Takeda 1982)
    assert float(np.sqrt(np.mean(e[inner] ** 2))) < 3.0  # nm; phase-shifting does far better


def test_step_miscalibration_sensitivity_follows_the_literature():
    """Hariharan et al. 1987: a 5 % step error gives a phase error first order in the error for the
    4-step algorithm and only second order for the 5-frame one; Carre is insensitive to the step."""
    h, *_ = _surface(64)
    phi = 4 * np.pi * h / LAM
    eps = 0.05
    d4 = np.arange(4) * np.pi / 2
    e4 = ph.nstep_lsq(_frames(h, d4 * (1 + eps)), d4)[0] - phi
    d5 = np.array([-1, -0.5, 0, 0.5, 1]) * np.pi
    e5 = ph.hariharan5(_frames(h, d5 * (1 + eps)))[0] - phi
    dc = np.array([-3, -1, 1, 3]) * (np.pi / 4) * (1 + eps)
    ec = ph.carre(_frames(h, dc))[0] - phi
    rms = lambda e: float(np.sqrt(np.mean(np.angle(np.exp(1j * e)) ** 2)))  # noqa: E731
    assert rms(e5) < rms(e4) / 20
    assert rms(ec) < 1e-9
    assert rms(e4) > 0.01


def test_frames_file_is_ingestible_as_a_map(tmp_path):
    h, *_ = _surface(64)
    d = np.arange(5) * 2 * np.pi / 5
    np.savez(
        tmp_path / "raw.npz",
        frames=_frames(h, d),
        steps_rad=d,
        algorithm="lsq",
        dx_mm=0.5,
        wavelength_nm=LAM,
    )
    m = read_map(tmp_path / "raw.npz")
    assert m.kind == "surface" and m.dx_mm == 0.5
    assert _rms_err(m.height_nm, h, np.isfinite(m.height_nm)) < 1e-6
    with pytest.raises(Exception, match="needs the phase steps"):
        np.savez(
            tmp_path / "bad.npz",
            frames=_frames(h, d),
            algorithm="lsq",
            dx_mm=0.5,
            wavelength_nm=LAM,
        )
        read_map(tmp_path / "bad.npz", metadata=Metadata())


@pytest.mark.parametrize(
    "frames,message",
    [
        (np.zeros((3, 4)), "stack of 2-D images"),
        (np.zeros((4, 8, 8)), "needs 5 frames"),
    ],
)
def test_bad_frames(frames, message):
    with pytest.raises(ValueError, match=message):
        ph.hariharan5(frames)


@pytest.mark.parametrize("outside", [0.0, 5.0, 100.0])
def test_fourier_method_keeps_its_aperture_inside_the_pupil(outside):
    """A 50 px pupil on a 128^2 frame with a tilt carrier of 0.21 cycles/px, dark, dim or bright
    around it: no pixel outside the pupil is valid (the filtered modulation leaks past the edge,
    so validity is the local modulation at half its plateau), the crop is the filter's width
    (2 / 0.21 -> 10 px), and inside it the phase error is under 1 nm RMS of surface (Takeda,
    Ina & Kobayashi, JOSA 72(1):156, 1982: the method rings at the pupil edge)."""
    h, r, c = _surface(128)
    h = h * 0.3
    pupil = (r - 63.7) ** 2 + (c - 64.2) ** 2 <= 50.0**2
    carrier = 2 * np.pi * (0.2 * c + 0.07 * r)
    f = np.where(pupil, 100 + 60 * np.cos(4 * np.pi * h / LAM + carrier), outside)
    f = f + RNG.normal(0, 0.2, f.shape)
    edge = ph.fourier_edge_px(ph.find_carrier(f))
    assert edge == 10
    unwrapped, _ = ph.retrieve(f[None], algorithm="fourier")
    valid = np.isfinite(unwrapped)
    assert not (valid & ~pupil).any()
    inner = (r - 63.7) ** 2 + (c - 64.2) ** 2 <= (50.0 - 2 * edge) ** 2
    assert valid[inner].all()  # at most twice the crop is lost
    e = ph.phase_to_height_nm(unwrapped, LAM) - h
    A = np.column_stack([np.ones(valid.sum()), r[valid], c[valid]])
    resid = e[valid] - A @ np.linalg.lstsq(A, e[valid], rcond=None)[0]  # carrier residue = tilt
    assert float(np.sqrt(np.mean(resid**2))) < 1.0
