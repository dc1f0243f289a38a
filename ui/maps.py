"""Height maps in the browser (plotly): a 2-D map and a rotatable 3-D surface, axes in mm, on
shopdb's colour scale. Builders only: they read arrays and compute nothing new."""

from __future__ import annotations

import numpy as np
import plotly.graph_objects as go

from shopdb.surface.image import colour_scale

MAX_SIDE = 200  # points per side drawn (the map is thinned for the browser, not resampled)
MAX_SIDE_3D = 120  # a surface is drawn in WebGL: kept light for machines without a GPU


def _axes(
    z: np.ndarray, dx_mm: float, side: int = MAX_SIDE
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    step = max(1, int(np.ceil(max(z.shape) / side)))
    zz = z[::step, ::step]
    ny, nx = zz.shape
    x = (np.arange(nx) * step - (z.shape[1] - 1) / 2) * dx_mm
    y = ((z.shape[0] - 1) / 2 - np.arange(ny) * step) * dx_mm  # +y towards row 0 (up)
    return x, y, zz


def map_2d(
    z: np.ndarray,
    dx_mm: float,
    *,
    lo: float | None = None,
    hi: float | None = None,
    title: str = "",
) -> go.Figure:
    """The map seen from above, x and y in mm from its centre, +y up."""
    x, y, zz = _axes(z, dx_mm)
    fig = go.Figure(
        go.Heatmap(
            x=x,
            y=y,
            z=zz,
            zmin=lo,
            zmax=hi,
            colorscale=colour_scale(),
            colorbar={"title": {"text": "height (nm)"}},
            hovertemplate="x %{x:.1f} mm, y %{y:.1f} mm: %{z:.2f} nm<extra></extra>",
        )
    )
    fig.update_layout(
        title=title,
        xaxis={"title": "x (mm)", "constrain": "domain"},
        yaxis={"title": "y (mm)", "scaleanchor": "x"},
        margin={"l": 50, "r": 10, "t": 40 if title else 10, "b": 40},
        height=420,
    )
    return fig


def surface_3d(z: np.ndarray, dx_mm: float, *, title: str = "") -> go.Figure:
    """The map as a surface to turn with the mouse; heights exaggerated by the plot's aspect."""
    x, y, zz = _axes(z, dx_mm, MAX_SIDE_3D)
    fig = go.Figure(
        go.Surface(
            x=x,
            y=y,
            z=zz,
            colorscale=colour_scale(),
            colorbar={"title": {"text": "height (nm)"}},
            hovertemplate="x %{x:.1f} mm, y %{y:.1f} mm: %{z:.2f} nm<extra></extra>",
        )
    )
    fig.update_layout(
        title=title,
        scene={
            "xaxis_title": "x (mm)",
            "yaxis_title": "y (mm)",
            "zaxis_title": "height (nm)",
            "aspectmode": "manual",
            "aspectratio": {"x": 1, "y": 1, "z": 0.35},
        },
        margin={"l": 0, "r": 0, "t": 40 if title else 0, "b": 0},
        height=420,
    )
    return fig
