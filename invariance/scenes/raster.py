"""Antialiased drawing and compositing on float images.

Images are float32 ``(3, H, W)`` (channel-first: per-pixel factors broadcast over the
leading axis, which numpy does fast) until the final conversion to uint8 ``(H, W, 3)``.
A *layer* is one shape drawn in a local patch: ``(premultiplied RGB (3, h, w), alpha
(h, w), row0, col0)``, or ``None`` when the shape falls outside the image.
"""

from __future__ import annotations

import functools
import math

import numpy as np
from PIL import Image, ImageDraw

from .palette import _resolve_colour
from .shapes import _SHAPES


@functools.lru_cache(maxsize=8)
def _grid(size: int) -> tuple[np.ndarray, np.ndarray]:
    """Pixel-centre coordinates in 0..1: x of shape (1, n), y of shape (n, 1)."""
    c = (np.arange(size, dtype=np.float32) + 0.5) / size
    return c[None, :], c[:, None]


def _clip01(a: np.ndarray) -> np.ndarray:
    """``a`` clipped to [0, 1]."""
    return np.minimum(np.maximum(a, 0.0), 1.0)  # np.clip's Python wrapper costs more here


def _col(rgb) -> np.ndarray:
    """An RGB triple as a float32 (3, 1, 1) array that broadcasts over an image."""
    return np.asarray(rgb, dtype=np.float32).reshape(3, 1, 1)


def _supersample(size: int) -> int:
    """Subpixel factor for antialiased shapes: 3x3 up to 256 px, 2x2 above (speed)."""
    return 3 if size <= 256 else 2


def _render_shape(kind: str, colour, cx: float, cy: float, radius: float, angle_deg: float, size: int):
    """Draw one shape antialiased (box-filtered supersampling) in a local patch.

    Returns ``(premultiplied RGB float32 (3, h, w), alpha float32 (h, w), row0, col0)``
    or ``None`` when the shape falls outside the image. ``cx``, ``cy`` and ``radius`` are
    in output pixels. The patch is drawn in Pillow's premultiplied "RGBa" mode, whose
    ``reduce`` averages premultiplied values, which is what compositing needs.
    """
    pts, bounds, roles = _SHAPES[kind]
    a = math.radians(angle_deg)
    ca, sa = math.cos(a), math.sin(a)
    # local (u, v) -> screen: x = cx + R (u cos - v sin), y = cy - R (u sin + v cos)
    xy = pts @ (np.array([[ca, -sa], [-sa, -ca]]) * radius) + (cx, cy)
    lo, hi = xy.min(axis=0), xy.max(axis=0)
    c0, r0 = max(0, int(lo[0]) - 1), max(0, int(lo[1]) - 1)
    c1, r1 = min(size, int(hi[0]) + 2), min(size, int(hi[1]) + 2)
    if c1 <= c0 or r1 <= r0:
        return None
    s = _supersample(size)
    w, h = c1 - c0, r1 - r0
    canvas = Image.new("RGBa", (w * s, h * s))
    draw = ImageDraw.Draw(canvas)
    flat = ((xy - (c0, r0)) * s).ravel().tolist()
    colour = tuple(colour)
    for (i0, i1), role in zip(bounds, roles):
        draw.polygon(flat[i0:i1], fill=_resolve_colour(role, colour))
    if s > 1:
        canvas = canvas.reduce(s)
    arr = np.asarray(canvas, dtype=np.float32).transpose(2, 0, 1)
    return arr[:3], arr[3] * np.float32(1.0 / 255.0), r0, c0


def _composite(img: np.ndarray, layer) -> None:
    """Paint a premultiplied layer over ``img`` (float32 (3, H, W)) in place."""
    if layer is None:
        return
    prem, alpha, r0, c0 = layer
    h, w = alpha.shape
    region = img[:, r0 : r0 + h, c0 : c0 + w]
    region *= 1.0 - alpha
    region += prem


def _layer_box(layer) -> tuple[slice, slice]:
    """Row and column slices of the image that a layer's patch covers."""
    _, alpha, r0, c0 = layer
    return slice(r0, r0 + alpha.shape[0]), slice(c0, c0 + alpha.shape[1])


def _layer_mask(layer, size: int) -> np.ndarray:
    """Pixels at least half covered by the layer."""
    mask = np.zeros((size, size), dtype=bool)
    if layer is not None:
        mask[_layer_box(layer)] = layer[1] >= 0.5
    return mask


def _to_uint8(img: np.ndarray) -> np.ndarray:
    """float (3, H, W) -> rounded (half up), clipped uint8 (H, W, 3)."""
    t = np.clip(img, 0.0, 255.0)
    t += 0.5
    u = t.astype(np.uint8)
    return np.stack((u[0], u[1], u[2]), axis=-1)
