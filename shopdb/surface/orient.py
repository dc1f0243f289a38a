"""The axis convention of every map in shopdb, and the flips and turns that bring maps and
Zernike coefficients to it.

Convention
----------
A height map is an array ``height_nm[row, col]``. Row 0 is the top of the image as displayed;
**+x runs along increasing column index, +y towards row 0 (up the image)**, and angles are
counter-clockwise from +x. Zernike sin terms (m < 0) are therefore positive towards +y: coma y,
Z(3, -1), is positive where the surface is high at the top of the displayed map.

Readers bring each file to this convention from its own definition: ISO 25178-72 (X3P) stores
the points x fastest with y increasing from one row of data to the next, so the X3P reader
reverses the row order (the file's first row of data, its smallest y, becomes the bottom row).
Formats without axes of their own (``.npy``/``.npz``, text/CSV, TIFF, HDF5) are taken as images:
their first row is the top, +y points towards it. A station whose instrument writes otherwise
corrects it with its profile's ``flip`` and ``rotate_deg``.

Flips and turns (station profiles, reference calibrations): ``lr`` reverses the columns
(x -> -x), ``ud`` the rows (y -> -y); a turn is counter-clockwise in the displayed image, after
the flip.
"""

from __future__ import annotations

import math

import numpy as np

from shopdb.surface import zernike

FLIPS = ("none", "lr", "ud")
ROTATIONS = (0, 90, 180, 270)


def unit_xy(
    rows: np.ndarray, cols: np.ndarray, centre_rc: tuple[float, float], radius_px: float
) -> tuple[np.ndarray, np.ndarray]:
    """Unit-disk coordinates (x, y) of pixels in the convention above: x along the columns,
    y towards row 0.

    Notes
    -----
    The axis convention of the module notes; x and y in units of the aperture radius.

    Examples
    --------
    >>> x, y = unit_xy(np.array([0, 2]), np.array([1, 1]), (1.0, 1.0), 1.0)
    >>> x.tolist(), y.tolist()
    ([0.0, 0.0], [1.0, -1.0])
    """
    return (cols - centre_rc[1]) / radius_px, (centre_rc[0] - rows) / radius_px


def orient_map(height: np.ndarray, *, flip: str = "none", rotate_deg: int = 0) -> np.ndarray:
    """The map flipped (``lr``: columns reversed, ``ud``: rows reversed), then turned
    counter-clockwise by ``rotate_deg`` (0, 90, 180, 270). Returns the input itself when
    nothing changes.

    Notes
    -----
    numpy.rot90 turns the array counter-clockwise as it is displayed (row 0 on top), which with
    +y towards row 0 is counter-clockwise in (x, y).

    Examples
    --------
    >>> orient_map(np.array([[1, 2], [3, 4]]), flip="lr").tolist()
    [[2, 1], [4, 3]]
    >>> orient_map(np.array([[1, 2], [3, 4]]), rotate_deg=90).tolist()
    [[2, 4], [1, 3]]
    """
    if flip not in FLIPS:
        raise ValueError(f"flip {flip!r} is not one of {', '.join(FLIPS)}")
    if rotate_deg not in ROTATIONS:
        raise ValueError(f"rotation {rotate_deg!r} is not 0, 90, 180 or 270 degrees")
    h = height
    if flip == "lr":
        h = h[:, ::-1]
    elif flip == "ud":
        h = h[::-1, :]
    h = np.rot90(h, k=rotate_deg // 90)
    return h if h is height else np.ascontiguousarray(h)


def flip_factors(terms: list[tuple[int, int]], axis: str) -> np.ndarray:
    """Sign each coefficient takes when the surface is turned over about ``axis`` (``"x"`` or
    ``"y"``): about y (x -> -x) the cos terms take (-1)^m and the sin terms (-1)^(m+1); about x
    (y -> -y) the sin terms change sign.

    Notes
    -----
    theta -> pi - theta (about y) and theta -> -theta (about x) in cos(m theta), sin(m theta);
    the orthonormal Zernike polynomials of ANSI Z80.28 / ISO 24157.
    """
    if axis not in ("x", "y"):
        raise ValueError(f"flip axis {axis!r} is not 'x' or 'y'")
    out = []
    for _, m in terms:
        if axis == "y":  # theta -> pi - theta
            out.append((-1) ** m if m >= 0 else (-1) ** (-m + 1))
        else:  # theta -> -theta
            out.append(-1 if m < 0 else 1)
    return np.array(out, float)


def rotation_matrix(terms: list[tuple[int, int]], angle_deg: float) -> np.ndarray:
    """Coefficients of a surface turned counter-clockwise by ``angle_deg``: c' = R c.

    Notes
    -----
    A surface S turned by a is S'(theta) = S(theta - a), and
    cos m(theta - a) = cos m theta cos ma + sin m theta sin ma (likewise sin), so each
    (cos, sin) pair of azimuthal order m is turned by m a.
    """
    a = math.radians(angle_deg)
    index = {t: i for i, t in enumerate(terms)}
    r = np.eye(len(terms))
    for (n, m), i in index.items():
        if m > 0 and (n, -m) in index:
            j = index[(n, -m)]
            c, s = math.cos(m * a), math.sin(m * a)
            r[i, i], r[i, j] = c, -s
            r[j, i], r[j, j] = s, c
    return r


def orient_coefficients(
    coefficients: dict[str, float], *, flip: str = "none", rotate_deg: float = 0
) -> dict[str, float]:
    """``{"n,m": nm}`` of a surface flipped then turned as :func:`orient_map` does to a map.

    Notes
    -----
    The flip and rotation act on the (cos, sin) pairs of each azimuthal order m of the
    orthonormal Zernike terms (ANSI Z80.28 / ISO 24157): see :func:`flip_factors` and
    :func:`rotation_matrix`.

    Examples
    --------
    >>> orient_coefficients({"3,-1": 1.0}, flip="ud")
    {'3,-1': -1.0}
    """
    if flip not in FLIPS:
        raise ValueError(f"flip {flip!r} is not one of {', '.join(FLIPS)}")
    terms = [zernike.parse_key(k) for k in coefficients]
    c = np.array([coefficients[k] for k in coefficients], float)
    if flip != "none":
        c = c * flip_factors(terms, {"lr": "y", "ud": "x"}[flip])
    if rotate_deg:
        c = rotation_matrix(terms, rotate_deg) @ c
    return {k: float(v) for k, v in zip(coefficients, c, strict=True)}
