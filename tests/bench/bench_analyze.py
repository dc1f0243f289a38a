"""Benchmark of analyze() (run by hand: python tests/bench/bench_analyze.py [npix ...]).

Reports, for an npix x npix circular map with 66 terms (order 10):
- full analyze, first map on a new grid (cold: basis built) — the process's very first, which also
  pays the operating system's first touch of its working memory and the PSD band matrix, and the median over
  new grids in a process that has run — and the median over maps on the same grid with different
  dropouts (warm);
- the Zernike fit alone (right-hand side + downdate + solve) against the memory-bandwidth bound
  the issue sets, streaming a stored terms x pixels basis once (a plain B @ z; shopdb stores a
  separable form instead, see analysis._Basis);
- peak memory of analyze (tracemalloc, numpy allocations);
- side by side: poppy's decompose_opd_nonorthonormal_basis (cold, and with its basis cached) and a
  plain numpy.linalg.lstsq on a prebuilt basis.
"""

from __future__ import annotations

import statistics
import sys
import time
import tracemalloc

import numpy as np

from shopdb.surface import zernike
from shopdb.surface.analysis import _basis_for, analyze, clear_cache
from shopdb.surface.aperture import resolve
from shopdb.surface.maps import SurfaceMap
from shopdb.surface.settings import AnalysisSettings

RNG = np.random.default_rng(1)


def make_map(npix: int, drop: float, clustered: bool = False) -> SurfaceMap:
    c = (npix - 1) / 2
    r, col = np.mgrid[:npix, :npix]
    x, y = (col - c) / c, (c - r) / c
    rho, th = np.hypot(x, y), np.arctan2(y, x)
    z = (
        30 * zernike.zernike(2, 0, rho, th)
        + 10 * zernike.zernike(2, 2, rho, th)
        + 3 * zernike.zernike(4, 0, rho, th)
    )
    z = z + RNG.normal(0, 1.0, z.shape)
    z[rho > 1] = np.nan
    if clustered:  # a few dust-like blobs covering about `drop` of the aperture
        n_blobs = 6
        radius = c * np.sqrt(drop / n_blobs)
        for rr, cc in RNG.uniform(0.2 * npix, 0.8 * npix, (n_blobs, 2)):
            z[(r - rr) ** 2 + (col - cc) ** 2 < radius**2] = np.nan
    else:
        z[RNG.random(z.shape) < drop] = np.nan
    return SurfaceMap(z, 100 / npix, 632.8, centre_rc=(c, c), radius_px=c)


def timed(fn, repeat=1):
    out = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t)
    return out


def bench(npix: int, with_refs: bool) -> None:
    settings = AnalysisSettings(zernike_order=10)
    maps = [make_map(npix, 0.02 + 0.01 * i) for i in range(8)]
    blobs = [make_map(npix, 0.02, clustered=True) for _ in range(5)]
    analyze(make_map(128, 0.02), settings)  # warm the process (imports, thread pools), not the grid
    clear_cache()
    cold = timed(lambda: analyze(maps[0], settings))[0]  # includes the process's first touch
    # of its working memory and the PSD band matrix; then new grids (a smaller clear aperture each) in a
    # process that has run, as a station service switching parts would
    new_grid = []
    for scale in (0.99, 0.98, 0.97):
        clear_cache()
        m = maps[0]
        shrunk = SurfaceMap(
            m.height_nm, m.dx_mm, 632.8, centre_rc=m.centre_rc, radius_px=m.radius_px * scale
        )
        new_grid += timed(lambda s=shrunk: analyze(s, settings))
    clear_cache()
    analyze(maps[0], settings)
    warm = [timed(lambda m=m: analyze(m, settings))[0] for m in maps[1:]]
    warm_blobs = [timed(lambda m=m: analyze(m, settings))[0] for m in blobs]
    # fit alone: what analyze does for the coefficients, on the warm cache
    m = maps[3]
    geom = resolve(np.isfinite(m.height_nm), m.dx_mm, centre_rc=m.centre_rc, radius_px=m.radius_px)
    basis = _basis_for(geom, zernike.terms_up_to(10), "circle")
    z_ap = m.height_nm.ravel()[basis.flat_index]
    good = np.isfinite(z_ap)
    dropped = np.flatnonzero(~good)
    z0 = np.where(good, z_ap, 0.0)

    def fit():
        G = basis.normal_matrix(dropped)
        rhs = basis.rhs(z0)
        return np.linalg.solve(G, rhs)

    fit_t = statistics.median(timed(fit, 7))
    # the bound the issue sets: streaming a stored terms x pixels basis once (shopdb stores none)
    B = basis.columns(np.arange(basis.flat_index.size))
    stream_t = statistics.median(timed(lambda: B @ z0, 7))
    tracemalloc.start()
    clear_cache()
    analyze(maps[1], settings)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    print(
        f"\n{npix}x{npix}: {basis.flat_index.size} aperture pixels; a stored float64 basis would be "
        f"{B.nbytes / 2**20:.0f} MiB, the cached separable form is {basis.nbytes / 2**20:.0f} MiB"
    )
    print(f"  analyze cold, first in process {cold * 1000:8.1f} ms")
    print(
        f"  analyze cold, new grid, median of {len(new_grid)}  {statistics.median(new_grid) * 1000:8.1f} ms"
    )
    print(
        f"  analyze warm, 2-9 % scattered dropouts, median of {len(warm)}  {statistics.median(warm) * 1000:8.1f} ms"
    )
    print(
        f"  analyze warm, 2 % clustered dropouts, median of {len(warm_blobs)}    {statistics.median(warm_blobs) * 1000:8.1f} ms"
    )
    print(f"  Zernike fit alone (warm)       {fit_t * 1000:8.1f} ms")
    print(
        f"  one stream of a stored basis (B@z) {stream_t * 1000:6.1f} ms  -> fit / stream = {fit_t / stream_t:.2f}"
    )
    print(f"  peak memory of analyze (cold)  {peak / 2**20:8.0f} MiB")
    if not with_refs:
        return
    import poppy.zernike as pz

    opd = np.nan_to_num(maps[3].height_nm)
    ap = np.isfinite(maps[3].height_nm).astype(float)
    poppy_cold = timed(lambda: pz.decompose_opd_nonorthonormal_basis(opd, aperture=ap, nterms=66))[
        0
    ]
    pbasis = pz.zernike_basis_faster(nterms=66, npix=npix, outside=np.nan)
    poppy_warm = timed(
        lambda: pz.decompose_opd_nonorthonormal_basis(
            opd, aperture=ap, nterms=66, basis=lambda **kw: pbasis
        )
    )[0]
    A = B[:, good].T.copy()
    lstsq_t = timed(lambda: np.linalg.lstsq(A, z_ap[good], rcond=None))[0]
    med = statistics.median(warm)
    print(
        f"  poppy decompose_opd_nonorthonormal_basis cold   {poppy_cold * 1000:8.0f} ms  (x{poppy_cold / med:.0f} of warm analyze)"
    )
    print(
        f"  poppy with its basis prebuilt                   {poppy_warm * 1000:8.0f} ms  (x{poppy_warm / med:.0f})"
    )
    print(
        f"  numpy.linalg.lstsq on a prebuilt basis          {lstsq_t * 1000:8.0f} ms  (x{lstsq_t / med:.0f})"
    )
    print(
        f"  shopdb fit alone vs poppy prebuilt: x{poppy_warm / fit_t:.0f} faster; vs lstsq: x{lstsq_t / fit_t:.0f} faster"
    )


if __name__ == "__main__":
    sizes = [int(a) for a in sys.argv[1:]] or [1024, 2048]
    for n in sizes:
        bench(n, with_refs=n <= 1024)
