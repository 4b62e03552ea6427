"""A drift map drawn over the cluttered view: an RGB array for the report, a PNG figure for files.

Red marks where the clutter adds drift (restoring the clean pixels there brings the
feature back), blue where restoring would move it further away. The colour scale is
symmetric about zero and clipped at the 99th percentile of |map| over the pixels the map
touches, so a few extreme pixels (common in gradient maps) do not wash the rest out
(common practice for saliency displays). The view underneath is shown in grey so that the
map's colours cannot be confused with the scene's.
"""

from __future__ import annotations

import io

import numpy as np
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.cm import ScalarMappable
from matplotlib.colors import Normalize
from matplotlib.figure import Figure
from matplotlib.ticker import FormatStrFormatter

from invariance.errors import InvarianceError

from ._common import _as_rgb_array

# Diverging, colour-blind safe (ColorBrewer RdBu; Harrower & Brewer, The Cartographic
# Journal 40, 2003), reversed so red means "adds drift".
_CMAP = "RdBu_r"
_CLIP_PERCENTILE = 99.0
_MAX_ALPHA = 0.85  # the strongest map colour still lets the scene show through
_DPI = 100


def map_scale(drift_map) -> float:
    """The |value| at which the colour saturates: the 99th percentile of |map| where it is non-zero."""
    arr = np.abs(np.asarray(drift_map, dtype=np.float64))
    touched = arr[arr > 0]
    return float(np.percentile(touched, _CLIP_PERCENTILE)) if touched.size else 1.0


def overlay_rgb(image, drift_map, *, scale: float | None = None) -> np.ndarray:
    """The map blended over a grey copy of ``image``.

    Parameters
    ----------
    image : PIL.Image.Image or ndarray of shape (H, W, 3), uint8
        Usually the cluttered view.
    drift_map : ndarray of shape (H, W)
        From :func:`~invariance.explain.occlusion_map` or :func:`~invariance.explain.gradient_map`.
    scale : float, optional
        |value| of full colour; default :func:`map_scale`.

    Returns
    -------
    ndarray of shape (H, W, 3), uint8
    """
    rgb = _as_rgb_array(image, "the image under a drift map")
    values = np.asarray(drift_map, dtype=np.float64)
    if values.shape != rgb.shape[:2] or not np.isfinite(values).all():
        raise InvarianceError(f"the drift map is {values.shape}, the image {rgb.shape[:2]}; give a finite map "
                              "of the image's size")
    scale = map_scale(values) if scale is None else float(scale)
    grey = rgb.astype(np.float64) @ np.array([0.299, 0.587, 0.114])  # ITU-R BT.601 luma
    base = np.repeat((0.35 + 0.5 * grey / 255.0)[..., None], 3, axis=2)
    level = np.clip(values / scale, -1.0, 1.0)
    colour = colormaps[_CMAP](0.5 + 0.5 * level)[..., :3]
    alpha = _MAX_ALPHA * np.abs(level)[..., None]
    return np.clip(np.rint(255.0 * ((1.0 - alpha) * base + alpha * colour)), 0, 255).astype(np.uint8)


def _units(result: dict) -> str:
    if result["method"] == "occlusion":
        return f"drift removed by restoring each {result['patch']} px patch (1 - cos, per pixel)"
    return "first-order drift per pixel (gradient x change, 1 - cos)"


def figure_png(clean, cluttered, result: dict, *, title: str) -> bytes:
    """Clean view, cluttered view and the map over the cluttered view, with a colour bar, as PNG.

    Parameters
    ----------
    clean, cluttered : PIL.Image.Image or ndarray of shape (H, W, 3), uint8
    result : dict
        A map from :func:`~invariance.explain.occlusion_map` or :func:`~invariance.explain.gradient_map`.
    title : str
        The figure's title (pair name, drift, shares).

    Returns
    -------
    bytes
        A PNG without time stamps, so the same inputs give the same bytes.
    """
    scale = map_scale(result["map"])
    fig = Figure(figsize=(9.6, 3.4), dpi=_DPI)
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, 3)
    for ax, img, label in zip(axes, (_as_rgb_array(clean, "clean view"), cluttered, None),
                              ("clean view", "cluttered view", "drift map")):
        shown = overlay_rgb(cluttered, result["map"], scale=scale) if img is None else _as_rgb_array(img, label)
        ax.imshow(shown, interpolation="nearest")
        ax.set_title(label, fontsize=10)
        ax.set_axis_off()
    mappable = ScalarMappable(norm=Normalize(-scale, scale), cmap=_CMAP)
    bar = fig.colorbar(mappable, ax=axes[2], fraction=0.046, pad=0.04)
    bar.set_label("red: clutter adds drift here", fontsize=8)
    bar.ax.tick_params(labelsize=8)
    bar.ax.yaxis.set_major_formatter(FormatStrFormatter("%.1e"))  # no offset text over the panel title
    fig.suptitle(title, fontsize=10)
    fig.text(0.5, 0.04, _units(result), ha="center", fontsize=9)
    fig.subplots_adjust(left=0.02, right=0.9, bottom=0.1, top=0.84, wspace=0.08)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})
    return buf.getvalue()
