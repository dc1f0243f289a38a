"""Height maps as images (PNG): a perceptual colour scale, no-data in light grey, true aspect, colour bar."""

from __future__ import annotations

import io

import numpy as np
from PIL import Image, ImageDraw

# anchor colours of a perceptually ordered scale (dark blue -> teal -> yellow)
_ANCHORS = np.array(
    [[38, 36, 96], [42, 92, 140], [33, 145, 140], [94, 190, 96], [222, 224, 72]], float
)


def _lut(n: int = 256) -> np.ndarray:
    x = np.linspace(0, 1, n)
    pos = np.linspace(0, 1, len(_ANCHORS))
    return np.stack([np.interp(x, pos, _ANCHORS[:, c]) for c in range(3)], axis=1).astype(np.uint8)


LUT = _lut()


def render(
    height_nm: np.ndarray, *, scale: int = 2, lo: float | None = None, hi: float | None = None
) -> tuple[bytes, float, float]:
    """PNG bytes of the map (row 0 at the top), and the value range of the colour scale in nm.

    Notes
    -----
    A perceptually ordered colour map of our own (common practice: a monotonic lightness ramp
    reads as height); no data is light grey.
    """
    z = np.asarray(height_nm, float)
    good = np.isfinite(z)
    if lo is None or hi is None:
        v = z[good]
        lo, hi = (
            (float(np.percentile(v, 0.5)), float(np.percentile(v, 99.5))) if v.size else (0.0, 1.0)
        )
    span = hi - lo if hi > lo else 1.0
    idx = np.clip(((z - lo) / span * 255), 0, 255)
    rgb = LUT[np.nan_to_num(idx).astype(int)]
    rgb[~good] = (232, 232, 232)
    img = Image.fromarray(rgb, "RGB")
    if scale != 1:
        img = img.resize((img.width * scale, img.height * scale), Image.Resampling.NEAREST)
    buf = io.BytesIO()
    img.save(buf, format="PNG")
    return buf.getvalue(), lo, hi


def colour_bar(lo: float, hi: float, *, width: int = 420) -> bytes:
    """PNG of a horizontal colour bar from ``lo`` to ``hi`` nm.

    Notes
    -----
    The colour bar of :func:`render`'s colour map, labelled with its range in nm.
    """
    bar = np.tile(LUT[np.linspace(0, 255, width).astype(int)][None, :, :], (18, 1, 1))
    img = Image.new("RGB", (width, 36), (255, 255, 255))
    img.paste(Image.fromarray(bar, "RGB"), (0, 0))
    d = ImageDraw.Draw(img)
    d.text((2, 21), f"{lo:.1f} nm", fill=(20, 20, 20))
    label = f"{hi:.1f} nm"
    d.text((width - 7 * len(label), 21), label, fill=(20, 20, 20))
    buf = io.BytesIO()
    img.save(buf, format="PNG")
    return buf.getvalue()


def colour_scale() -> list[list]:
    """The colour map as stops for a plotting library: [[position 0..1, "rgb(r,g,b)"], ...].

    Notes
    -----
    The same perceptually ordered anchors as :func:`render`.
    """
    pos = np.linspace(0, 1, len(_ANCHORS))
    return [
        [float(p), f"rgb({int(r)},{int(g)},{int(b)})"]
        for p, (r, g, b) in zip(pos, _ANCHORS, strict=True)
    ]
