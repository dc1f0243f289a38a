"""Wrapped phase from interferograms, unwrapping, and phase -> height.

Frames follow I_k = A + B cos(phi + delta_k) (A background, B modulation, delta_k the phase step).

Notes
-----
- N-step least squares with known steps: Greivenkamp, Opt. Eng. 23(4):350 (1984). Per pixel
  I_k = a0 + a1 cos delta_k + a2 sin delta_k is solved in the least-squares sense;
  phi = atan2(-a2, a1), B = hypot(a1, a2).
- Hariharan five-frame (steps -pi, -pi/2, 0, pi/2, pi): Hariharan, Oreb & Eiju, Appl. Opt.
  26(13):2504 (1987): tan phi = 2 (I2 - I4) / (2 I3 - I1 - I5); a step miscalibration enters
  only at second order.
- Carre (1966), four frames at -3a, -a, a, 3a with the step 2a unknown:
  tan phi = sqrt(|(3(I2 - I3) - (I1 - I4)) ((I2 - I3) + (I1 - I4))|) / ((I2 + I3) - (I1 + I4)),
  the sign of the numerator from (I2 - I3).
- Fourier-transform method for one frame with a tilt carrier: Takeda, Ina & Kobayashi,
  J. Opt. Soc. Am. 72(1):156 (1982): keep one sideband of the spectrum, inverse-transform, and
  remove the carrier.
- Unwrapping: scikit-image's ``unwrap_phase`` (Herraez et al., Appl. Opt. 41(35):7437, 2002),
  reliability-sorted and robust to holes (masked pixels).
- Height: in a double-pass (reflection) test the optical path is twice the surface, so
  h = phi lambda / (4 pi); a wavefront is phi lambda / (2 pi).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

ALGORITHMS = ("lsq", "hariharan5", "carre", "fourier")


def _frames(frames, count: int | None = None) -> np.ndarray:
    f = np.asarray(frames, dtype=np.float64)
    if f.ndim != 3:
        raise ValueError(
            f"frames must be a stack of 2-D images (K, rows, cols), got shape {f.shape}"
        )
    if count is not None and f.shape[0] != count:
        raise ValueError(f"this algorithm needs {count} frames, got {f.shape[0]}")
    if not np.isfinite(f).all():
        raise ValueError("frames hold NaN or infinite intensities")
    return f


def nstep_lsq(frames, steps_rad) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(wrapped phase, modulation B, background A) from K >= 3 frames with known steps (Greivenkamp 1984).

    Notes
    -----
    Greivenkamp, Opt. Eng. 23(4):350 (1984): least squares for I = A + B cos(phi + delta_k)
    with known steps delta_k.
    """
    f = _frames(frames)
    d = np.asarray(steps_rad, dtype=float)
    if d.shape != (f.shape[0],) or f.shape[0] < 3:
        raise ValueError(
            f"need one phase step per frame and at least 3 frames, got {d.size} steps for {f.shape[0]} frames"
        )
    M = np.column_stack([np.ones_like(d), np.cos(d), np.sin(d)])
    if np.linalg.matrix_rank(M) < 3:
        raise ValueError(
            "the phase steps do not determine the phase (they must not all be equal modulo pi)"
        )
    coef = np.linalg.pinv(M) @ f.reshape(f.shape[0], -1)
    a0, a1, a2 = (c.reshape(f.shape[1:]) for c in coef)
    return np.arctan2(-a2, a1), np.hypot(a1, a2), a0


def hariharan5(frames) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(wrapped phase, modulation, background) from five frames stepped by pi/2 (Hariharan et al. 1987).

    Notes
    -----
    Hariharan, Oreb & Eiju, Appl. Opt. 26(13):2504 (1987): five frames at pi/2 steps,
    tan phi = 2 (I2 - I4) / (2 I3 - I5 - I1).
    """
    i1, i2, i3, i4, i5 = _frames(frames, 5)
    num = 2 * (i2 - i4)
    den = 2 * i3 - i1 - i5
    # num = 4 B sin(phi) sin(a)^2 ... for nominal a = pi/2: num = 4 B sin phi, den = 4 B cos phi
    return np.arctan2(num, den), np.hypot(num, den) / 4, (i1 + 2 * i2 + 2 * i3 + 2 * i4 + i5) / 8


def carre(frames) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(wrapped phase, modulation, background) from four frames at -3a, -a, a, 3a, a unknown (Carre 1966).

    Notes
    -----
    Carré, Metrologia 2(1):13 (1966): four frames with an equal, unknown step.
    """
    i1, i2, i3, i4 = _frames(frames, 4)
    d23, d14 = i2 - i3, i1 - i4
    num = np.sqrt(np.abs((3 * d23 - d14) * (d23 + d14))) * np.sign(d23)
    den = (i2 + i3) - (i1 + i4)
    phi = np.arctan2(num, den)
    # one step for the frame: tan^2(a) = (3 d23 - d14) / (d23 + d14), median over the pixels with
    # the strongest signal (where there are no fringes the ratio is noise)
    s = d23 + d14
    strong = np.abs(s) >= np.quantile(np.abs(s), 0.5)
    with np.errstate(divide="ignore", invalid="ignore"):
        t2 = (3 * d23 - d14)[strong] / s[strong]
    a = float(np.arctan(np.sqrt(np.clip(np.nanmedian(t2), 1e-12, None))))
    # I2 - I3 = 2 B sin(phi) sin(a); (I2 + I3) - (I1 + I4) = 8 B cos(phi) sin(a)^2 cos(a)
    b = np.hypot(d23 / (2 * np.sin(a)), den / (8 * np.sin(a) ** 2 * np.cos(a)))
    return phi, b, (i1 + i2 + i3 + i4) / 4


def find_carrier(frame) -> tuple[float, float]:
    """(f_row, f_col) in cycles per pixel of a tilt-fringe carrier: the strongest spectral peak
    away from zero frequency, in one half-plane.

    Notes
    -----
    Takeda, Ina & Kobayashi, J. Opt. Soc. Am. 72(1):156 (1982): the tilt carrier is the
    sideband's peak in the frame's spectrum.
    """
    f = np.asarray(frame, dtype=np.float64)
    ny, nx = f.shape
    mag = np.abs(np.fft.fft2(f - f.mean()))
    fy = np.fft.fftfreq(ny)[:, None]
    fx = np.fft.fftfreq(nx)[None, :]
    mag[np.hypot(fy, fx) < 3.0 / min(ny, nx)] = 0
    mag[(fx < 0) | ((fx == 0) & (fy < 0))] = 0  # one half-plane
    k = np.unravel_index(np.argmax(mag), mag.shape)
    return float(fy[k[0], 0]), float(fx[0, k[1]])


def fourier_edge_px(carrier_per_px: tuple[float, float]) -> int:
    """Pixels the Fourier method's filter smears the pupil edge over: the sideband window's
    radius is half the carrier frequency fc, so its impulse response is ~2 / fc px wide.

    Notes
    -----
    The sideband window's radius is fc / 2 (Takeda et al. 1982); a window of radius w in
    frequency smears an edge over ~1 / w pixels, i.e. 2 / fc.
    """
    return math.ceil(2 / math.hypot(*carrier_per_px))


def fourier_transform(
    frame, *, carrier_per_px: tuple[float, float] | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(wrapped phase, modulation, local background) from one frame with a tilt carrier
    (Takeda, Ina & Kobayashi, J. Opt. Soc. Am. 72(1):156, 1982).

    ``carrier_per_px`` is (f_row, f_col) in cycles per pixel (:func:`find_carrier` when not
    given). The sideband is kept with a flat-topped window of radius half the carrier frequency,
    the background with the same window about zero frequency, so modulation and background are
    both local (a whole-frame mean would call the filter's leakage past the pupil edge valid
    fringes). A carrier estimated to the nearest frequency bin leaves a small tilt, which the
    analysis removes.

    Notes
    -----
    Takeda, Ina & Kobayashi, J. Opt. Soc. Am. 72(1):156 (1982).
    """
    f = np.asarray(frame, dtype=np.float64)
    if f.ndim != 2 or not np.isfinite(f).all():
        raise ValueError("the interferogram must be a finite 2-D image")
    ny, nx = f.shape
    spec = np.fft.fft2(f)
    fy = np.fft.fftfreq(ny)[:, None]
    fx = np.fft.fftfreq(nx)[None, :]
    cy, cx = carrier_per_px if carrier_per_px is not None else find_carrier(f)
    fc = math.hypot(cy, cx)
    if fc < 2.0 / min(ny, nx):
        raise ValueError(
            "no usable fringe carrier: the interferogram needs tilt fringes for the Fourier method"
        )

    def window(r: np.ndarray) -> np.ndarray:
        """Flat-topped (Tukey) window: passes unweighted inside 0.6, tapered to 0 at 1."""
        return np.where(
            r < 0.6, 1.0, np.where(r < 1, 0.5 * (1 + np.cos(np.pi * (r - 0.6) / 0.4)), 0.0)
        )

    c = np.fft.ifft2(spec * window(np.hypot(fy - cy, fx - cx) / (fc / 2)))
    background = np.fft.ifft2(spec * window(np.hypot(fy, fx) / (fc / 2))).real
    rows, cols = np.mgrid[:ny, :nx]
    c = c * np.exp(-2j * np.pi * (cy * rows + cx * cols))
    return np.angle(c), 2 * np.abs(c), background


def unwrap(phase: np.ndarray, valid: np.ndarray | None = None, *, seed: int = 0) -> np.ndarray:
    """Unwrapped phase (NaN outside ``valid``) by scikit-image's reliability-sorted unwrapper.

    Notes
    -----
    Herráez, Burton, Lalor & Gdeisat, Appl. Opt. 41(35):7437 (2002), as implemented by
    scikit-image's ``unwrap_phase``.
    """
    from skimage.restoration import unwrap_phase

    if valid is None:
        valid = np.isfinite(phase)
    if valid.sum() < 4:
        raise ValueError("too few valid pixels to unwrap")
    masked = np.ma.masked_array(np.where(valid, phase, 0.0), mask=~valid)
    out = unwrap_phase(masked, rng=seed)
    return np.where(valid, np.ma.getdata(out), np.nan)


def retrieve(
    frames, *, algorithm: str = "lsq", steps_rad=None, modulation_threshold: float = 0.1
) -> tuple[np.ndarray, np.ndarray]:
    """(unwrapped phase with NaN where invalid, relative modulation B/A) from phase-shifted frames.

    A pixel is valid where B/A >= ``modulation_threshold`` (fringe contrast, common practice).
    For the Fourier method, B and A are local (filtered); the pupil is where B is at least half
    its plateau (the 90th percentile of B), and it is cropped by :func:`fourier_edge_px` (the
    filter's width, 2 / carrier frequency), where the method rings (Takeda et al. 1982): the
    valid region lies inside the true pupil by that width, and inside it the phase error is
    under 1 nm RMS of surface in ``tests/surface/test_phase.py``.
    ``algorithm``: ``lsq`` (needs ``steps_rad``), ``hariharan5``, ``carre``, or ``fourier`` (one frame).

    Notes
    -----
    The algorithms' papers are cited on each function; fringe contrast B/A as the validity
    criterion is common practice.
    """
    f = np.asarray(frames, dtype=np.float64)
    if algorithm == "lsq":
        if steps_rad is None:
            raise ValueError("the least-squares algorithm needs the phase steps")
        phi, b, a = nstep_lsq(f, steps_rad)
    elif algorithm == "hariharan5":
        phi, b, a = hariharan5(f)
    elif algorithm == "carre":
        phi, b, a = carre(f)
    elif algorithm == "fourier":
        frame = f[0] if f.ndim == 3 else f
        carrier = find_carrier(frame)
        phi, b, a = fourier_transform(frame, carrier_per_px=carrier)
    else:
        raise ValueError(f"phase algorithm {algorithm!r} is not one of {', '.join(ALGORITHMS)}")
    with np.errstate(divide="ignore", invalid="ignore"):
        gamma = np.where(a > 0, b / a, 0.0)
    valid = gamma >= modulation_threshold
    if algorithm == "fourier":
        # the filter smears the pupil edge over fourier_edge_px: those pixels are not trusted
        valid = ndimage.distance_transform_edt(np.pad(valid, 1))[1:-1, 1:-1] > fourier_edge_px(
            carrier
        )
    return unwrap(phi, valid), gamma


def phase_to_height_nm(
    phase: np.ndarray, wavelength_nm: float, *, reflection: bool = True
) -> np.ndarray:
    """Surface height (reflection, double pass: lambda / 4 pi per radian) or wavefront (lambda / 2 pi).

    Notes
    -----
    Double pass (reflection): height = phase lambda / (4 pi); single pass: wavefront =
    phase lambda / (2 pi) (ISO 14999-4).
    """
    return phase * wavelength_nm / (4 * np.pi if reflection else 2 * np.pi)
