"""The catalogue of the quantities shopdb measures: one entry per stored scalar of a result, and
the two families, Zernike coefficients (``z:N,M``) and PSD band RMS (``band:K``).

Everything that names a quantity derives from here: the result columns a numeric analysis is
mapped to, the ``--metric`` names and their help, the app's pickers and axis titles, the callout
field that limits a quantity, the certificate's labels and the KPI Pareto's reasons. A new scalar
metric is one entry here (plus its computation in :mod:`shopdb.surface.analysis`, its column in
:mod:`shopdb.models` and a migration).

Pure: no database, no UI.
"""

from __future__ import annotations

import re
from dataclasses import dataclass


class MetricError(ValueError):
    """A metric name that is not in the catalogue; the message lists what is."""


@dataclass(frozen=True)
class Quantity:
    """One measured quantity.

    ``name`` is the metric name (``--metric``, JSON keys) and, for a scalar, the result column;
    ``label`` the words a person reads; ``unit`` the unit of the stored value ("nm", "µrad", or ""
    for a fraction); ``callout_field`` the ISO 10110-5 or shop callout field that limits it;
    ``certificate_label`` how a certificate names that field; ``chartable`` whether the app offers
    it on control charts; ``non_negative`` whether the quantity cannot be below zero (PV, RMS, band
    RMS: a control chart's lower limit is then not drawn below zero); ``pv_type`` whether it is a
    peak-to-valley quantity (its repeatability is larger than an RMS quantity's).
    """

    name: str
    label: str
    unit: str
    callout_field: str | None = None
    certificate_label: str | None = None
    chartable: bool = True
    non_negative: bool = True
    pv_type: bool = False
    family: str = "scalar"  # "scalar", "zernike" or "band"
    n: int | None = None
    m: int | None = None
    band: int | None = None  # 1-based PSD band

    @property
    def column(self) -> str | None:
        """The result column of a scalar quantity (None for a family member)."""
        return self.name if self.family == "scalar" else None

    @property
    def title(self) -> str:
        """Axis title or table header: the label with its unit."""
        return f"{self.label} ({self.unit})" if self.unit else self.label


SCALARS: tuple[Quantity, ...] = (
    Quantity("pv_nm", "PV", "nm", pv_type=True),
    Quantity("rms_nm", "RMS", "nm"),
    Quantity("pvr_nm", "PVr", "nm", "pvr", "PVr (robust PV)", pv_type=True),
    Quantity(
        "sag_nm",
        "sagitta deviation (power)",
        "nm",
        "sag",
        "sagitta deviation (A)",
        non_negative=False,
        pv_type=True,
    ),
    Quantity(
        "irregularity_nm", "irregularity", "nm", "irregularity", "irregularity (B)", pv_type=True
    ),
    Quantity(
        "rsi_nm",
        "rotationally symmetric irregularity",
        "nm",
        "rsi",
        "rot. sym. irregularity (C)",
        pv_type=True,
    ),
    Quantity("rmst_nm", "RMSt", "nm", "rmst", "RMSt (total)"),
    Quantity("rmsi_nm", "RMSi", "nm", "rmsi", "RMSi (irregularity)"),
    Quantity("rmsa_nm", "RMSa", "nm", "rmsa", "RMSa (non-rot. sym.)"),
    Quantity("slope_rms_urad", "slope RMS", "µrad", "slope", "slope RMS"),
    Quantity("slope_max_urad", "largest slope", "µrad"),
    Quantity("valid_fraction", "valid-pixel fraction", "", chartable=False),
)
BY_NAME = {q.name: q for q in SCALARS}
BY_FIELD = {q.callout_field: q for q in SCALARS if q.callout_field}
# callout fields in the order a drawing's callout and a certificate list them
FIELDS = tuple(BY_FIELD)

_ZERNIKE = re.compile(r"z:\s*(-?\d+)\s*,\s*(-?\d+)")
_BAND = re.compile(r"band:\s*(\d+)")
_BAND_FIELD = re.compile(r"band(\d+)")


def zernike_quantity(n: int, m: int) -> Quantity:
    """The quantity of one orthonormal Zernike coefficient (ANSI/ISO 24157 (n, m))."""
    from shopdb.surface import zernike

    zernike.key(n, m)  # validates (n, m)
    return Quantity(
        f"z:{n},{m}",
        f"Z({n},{m}) {zernike.name(n, m)}",
        "nm",
        non_negative=False,
        family="zernike",
        n=n,
        m=m,
    )


def band_quantity(k: int, edges_per_mm: tuple[float | None, ...] | None = None) -> Quantity:
    """The RMS of the K-th PSD band (1-based); with the band edges, its label names the periods."""
    if k < 1:
        raise MetricError(f"PSD band {k}: bands are numbered from 1")
    label = f"PSD band {k} RMS"
    if edges_per_mm is not None and k < len(edges_per_mm):
        label = f"PSD band {k} RMS ({period_range(edges_per_mm[k - 1], edges_per_mm[k])})"
    return Quantity(
        f"band:{k}",
        label,
        "nm",
        callout_field=f"band{k}",
        certificate_label=f"PSD band {k} RMS",
        family="band",
        band=k,
    )


def period_range(low_per_mm: float | None, high_per_mm: float | None) -> str:
    """A PSD band between two spatial frequencies (cycles/mm) as the periods a person reads.

    >>> period_range(0.0, 0.03), period_range(0.03, 0.2), period_range(0.66, None)
    ('over 33.3 mm', '5–33.3 mm', 'under 1.52 mm')
    """

    def open_end(f: float | None) -> bool:
        return f is None or f != f or f == float("inf")

    if not low_per_mm:
        return "any period" if open_end(high_per_mm) else f"over {1 / high_per_mm:.3g} mm"  # type: ignore[operator]
    if open_end(high_per_mm):
        return f"under {1 / low_per_mm:.3g} mm"
    return f"{1 / high_per_mm:.3g}–{1 / low_per_mm:.3g} mm"  # type: ignore[operator]


def parse_metric(text: str) -> Quantity:
    """The quantity a ``--metric`` names: a scalar name, ``z:N,M`` or ``band:K``.

    Examples
    --------
    >>> parse_metric("irregularity_nm").label
    'irregularity'
    >>> parse_metric("z:2,2").title
    'Z(2,2) astigmatism 0° (nm)'
    >>> parse_metric("band:3").callout_field
    'band3'
    """
    t = text.strip()
    if t in BY_NAME:
        return BY_NAME[t]
    z = _ZERNIKE.fullmatch(t)
    if z:
        try:
            return zernike_quantity(int(z.group(1)), int(z.group(2)))
        except ValueError as exc:
            raise MetricError(f"metric {text!r}: {exc}") from None
    b = _BAND.fullmatch(t)
    if b:
        return band_quantity(int(b.group(1)))
    raise MetricError(f"unknown metric {text!r}: {metric_help()}")


def for_field(field: str) -> Quantity:
    """The quantity a callout field limits (``sag``, ``irregularity``, ..., ``band2``)."""
    if field in BY_FIELD:
        return BY_FIELD[field]
    b = _BAND_FIELD.fullmatch(field)
    if b:
        return band_quantity(int(b.group(1)))
    raise MetricError(f"unknown callout field {field!r}")


def metric_help() -> str:
    """One line naming every metric, for ``--metric`` help and error messages."""
    return f"one of {', '.join(q.name for q in SCALARS)}, z:N,M (a Zernike term) or band:K (a PSD band)"


def chart_choices(band_count: int = 0, band_edges: tuple | None = None) -> list[Quantity]:
    """What the app offers on a control chart: the chartable scalars, then each PSD band."""
    out = [q for q in SCALARS if q.chartable]
    out += [band_quantity(k, band_edges) for k in range(1, band_count + 1)]
    return out


def value_of(q: Quantity, result: dict) -> float | None:
    """A quantity's value in a result's stored form (columns, ``psd_bands`` list, ``zernike``
    {(n, m): nm}); None when the result has none."""
    if q.family == "scalar":
        return result.get(q.name)
    if q.family == "band" and q.band is not None:
        bands = result.get("psd_bands") or []
        return bands[q.band - 1]["rms_nm"] if q.band <= len(bands) else None
    return (result.get("zernike") or {}).get((q.n, q.m))
