"""Occlusion sensitivity of the drift: restore one patch of the clean view at a time.

Zeiler & Fergus (ECCV 2014, "Visualizing and understanding convolutional networks",
section 4.2) slide a grey square over the input and record how the network's output
changes. Here the "occluder" is the clean view itself: patch ``p`` of the cluttered view
is replaced by the clean view's pixels, and the map records how much that lowers the
pair's drift,

    drop_p = d(cluttered) - d(cluttered with patch p restored),
    d(x) = 1 - cos(f(x), f(clean)),

with ``f`` the encoder's pooled feature at the chosen layer. A positive drop means the
clutter inside that patch moves the feature away from its clean twin. The figure is exact
for any encoder (no gradients, no linearisation): every restored image is run through
the encoder, batched, after the encoder's preprocessing (rebuilt in torch, see
:func:`._common._preprocess`, and applied as the linear map it is,
:class:`_RestoredBatches`). A patch whose pixels are the same in both views cannot
change anything, so its drop is exactly 0 and it costs no forward pass.
"""

from __future__ import annotations

import math

import numpy as np
import torch
from torchvision.transforms import InterpolationMode
from torchvision.transforms import functional as TF

from invariance.errors import InvarianceError
from invariance.validation import check_int

from ._common import (_check_encoder, _check_patch, _check_resized, _cosine_drift, _features, _layer_runner, _pair_arrays,
                      _to_tensor)

# Most patches in one map: a 64 x 64 grid. Bounds the restored images (and their
# features) per pair; a finer grid asks for a larger --patch.
MAX_PATCHES = 4096
# Images per forward pass. Batches of 16 were the fastest measured for both a small CNN
# (the demo encoder) and a compute-bound one (ResNet-18): 66 images of a 128 px pair cost
# 25-27 bare single-image passes for the first and 43-58 for the second, where one batch of
# 66 cost 55-69 for ResNet-18, whose activations then no longer fit the CPU's caches
# (tests/benchmarks/bench_explain.py, one thread). `invariance explain` passes its
# --batch-size instead, so a user can bound memory for large encoders.
DEFAULT_BATCH = 16
# Default grid: the image's shorter side cut into 16 patches, so a map costs the same number
# of forward passes (at most 256 plus the two views) at every image size and resolves
# objects about a sixteenth of the image across. A coarser 8 x 8 grid cannot: on 128 px
# workbench scenes a distractor is about 20 px across, and a map spread evenly over 16 px
# patches could put at most 0.43 of its mass on distractor pixels (tests/test_explain.py).
DEFAULT_GRID = 16


def _grid(height: int, width: int, patch: int) -> list[tuple[slice, slice]]:
    """Row-major patches of a ``patch``-pixel grid; the last row and column may be narrower."""
    return [
        (slice(r, min(r + patch, height)), slice(c, min(c + patch, width)))
        for r in range(0, height, patch)
        for c in range(0, width, patch)
    ]


def _resize_crop_matrices(preprocess, height: int, width: int) -> tuple[torch.Tensor, torch.Tensor]:
    """``(R_h, R_w)`` with ``crop(resize(X)) = R_h @ X @ R_w.T`` for every channel X.

    Resizing is linear and separable (each output pixel a weighted sum along rows, then
    along columns), so the matrices are the resize applied to the identity; the centre
    crop keeps their middle rows (torchvision's rounding of the offset).
    """
    mode = InterpolationMode(preprocess.interpolation)
    out_h, out_w = TF.resize(torch.zeros(1, height, width), preprocess.resize, interpolation=mode,
                             antialias=True).shape[-2:]
    top, left = int(round((out_h - preprocess.crop) / 2.0)), int(round((out_w - preprocess.crop) / 2.0))
    rows = TF.resize(torch.eye(height)[None], [out_h, height], interpolation=mode, antialias=True)[0]
    cols = TF.resize(torch.eye(width)[None], [out_w, width], interpolation=mode, antialias=True)[0]
    return rows[top : top + preprocess.crop], cols[left : left + preprocess.crop]


class _RestoredBatches:
    """Preprocessed restored images, built as the preprocessed cluttered view plus the
    preprocessed change inside one box: resize, crop and normalisation are linear (affine),
    so restoring box b adds ``R_h[:, b] (clean - cluttered)[b] R_w[:, b].T / std``. One
    pair of small products per box instead of a full resize per image; equal to
    preprocessing each restored image (:func:`._common._preprocess`) up to float rounding
    (checked in tests/test_explain.py)."""

    def __init__(self, preprocess, clean: torch.Tensor, cluttered: torch.Tensor):
        self.rows, self.cols = _resize_crop_matrices(preprocess, *clean.shape[-2:])
        self.std = torch.tensor(preprocess.std).view(3, 1, 1)
        mean = torch.tensor(preprocess.mean).view(3, 1, 1)
        self.base = (self.rows @ cluttered[0] @ self.cols.T - mean) / self.std
        self.change = clean[0] - cluttered[0]

    def __call__(self, boxes) -> torch.Tensor:
        # one small product per box: 3.8 ms for 64 boxes of a 128 px pair, faster than
        # stacking same-shaped boxes into one batched product (10 ms; measured, 1 thread)
        batch = self.base.expand(len(boxes), -1, -1, -1).clone()
        for j, (r, c) in enumerate(boxes):
            if r.stop > r.start and c.stop > c.start:
                batch[j] += self.rows[:, r] @ self.change[:, r, c] @ self.cols[:, c].T / self.std
        return batch


def _restored_features(encoder, run, key, clean, cluttered, boxes, batch_size: int, name: str) -> np.ndarray:
    """Features of the clean view, the cluttered view and one restored image per box.

    The views are the two extreme restorations (every pixel, no pixel), so they share the
    batches with the patches: ``batch_size`` images per forward pass.
    """
    height, width = clean.shape[-2:]
    every, none = (slice(0, height), slice(0, width)), (slice(0, 0), slice(0, 0))
    boxes = [every, none, *boxes]
    restored = _RestoredBatches(encoder.preprocess, clean, cluttered)
    rows = []
    for start in range(0, len(boxes), batch_size):
        rows.append(_features(encoder, run, key, restored(boxes[start : start + batch_size]), [name]))
    return np.concatenate(rows)


def _spread(drops: np.ndarray, boxes, shape) -> np.ndarray:
    """Per-pixel map: each patch's drop shared evenly by its pixels (the map sums to the drops)."""
    out = np.zeros(shape[:2], dtype=np.float64)
    for drop, (rows, cols) in zip(drops, boxes):
        area = (rows.stop - rows.start) * (cols.stop - cols.start)
        out[rows, cols] = drop / area
    return out


def spread_drops(drops, patch: int, height: int, width: int) -> np.ndarray:
    """The per-pixel occlusion map from its per-patch drops (as stored in a result JSON).

    Parameters
    ----------
    drops : array-like of shape (ceil(height / patch), ceil(width / patch))
        ``occlusion_map(...)["drops"]``.
    patch : int
        The patch side the drops were measured with.
    height, width : int
        The image's size in pixels.

    Returns
    -------
    ndarray of shape (height, width), float64
        Equal to ``occlusion_map(...)["map"]``: each drop shared evenly by its patch's pixels.
    """
    patch = check_int("patch", patch, low=1)
    boxes = _grid(check_int("height", height, low=1), check_int("width", width, low=1), patch)
    drops = np.asarray(drops, dtype=np.float64)
    if drops.shape != (math.ceil(height / patch), math.ceil(width / patch)) or not np.isfinite(drops).all():
        raise InvarianceError(f"occlusion drops of shape {drops.shape} do not fit a {width} x {height} px image "
                              f"cut into {patch} px patches; give the drops that occlusion_map returned")
    return _spread(drops.ravel(), boxes, (height, width))


def default_patch(height: int, width: int) -> int:
    """The default patch side: the shorter side over :data:`DEFAULT_GRID`, at least 1 px.

    Parameters
    ----------
    height, width : int
        The image's size in pixels.

    Returns
    -------
    int
    """
    return max(1, min(height, width) // DEFAULT_GRID)


def occlusion_map(encoder, clean, cluttered, *, patch: int | None = None, layer: str | None = None,
                  batch_size: int = DEFAULT_BATCH, name: str = "(unnamed)") -> dict:
    """How much restoring each patch of the clean view lowers a pair's cosine drift.

    Occlusion sensitivity (Zeiler & Fergus, ECCV 2014) with the clean view as the
    occluder; see the module docstring.

    Parameters
    ----------
    encoder : Encoder
        From :func:`invariance.encoders.load_encoder`.
    clean, cluttered : PIL.Image.Image or ndarray of shape (H, W, 3), uint8
        The two views of one scene, at the size they are stored (before preprocessing).
    patch : int, optional
        Side of the square patches in image pixels; the grid starts at the top-left
        corner and its last row and column may be narrower. At most the image's shorter
        side. Default :func:`default_patch`: the shorter side over 16 (8 px at 128 px).
    layer : str, optional
        Graph node whose pooled feature is compared (``invariance layers``); default the
        encoder's output feature.
    batch_size : int, default=16
        Images per forward pass (the two views count).
    name : str, default="(unnamed)"
        The pair's name, for messages.

    Returns
    -------
    dict
        ``method`` ("occlusion"), ``map`` (float64 (H, W): each patch's drop divided
        evenly among its pixels, so the map sums to the total of the drops), ``drops``
        (float64 (rows, cols), per patch), ``drift`` (1 - cos of the pair), ``patch``,
        ``layer``, ``forward_images`` (images run through the encoder: the two views and
        every patch whose pixels differ between them).
    """
    encoder = _check_encoder(encoder)
    clean_arr, cluttered_arr = _pair_arrays(clean, cluttered, name)
    if patch is None:
        patch = default_patch(*clean_arr.shape[:2])
    patch = _check_patch(patch, clean_arr.shape, name)
    _check_resized(encoder, clean_arr.shape, name)
    batch_size = check_int("batch_size", batch_size, low=1)
    run, key = _layer_runner(encoder, layer)
    boxes = _grid(*clean_arr.shape[:2], patch)
    if len(boxes) > MAX_PATCHES:
        raise InvarianceError(f"pair {name}: a {patch} px grid cuts the image into {len(boxes):,} patches, above the "
                              f"limit of {MAX_PATCHES:,}; pass a larger patch (--patch)")
    changed = [i for i, box in enumerate(boxes) if not np.array_equal(clean_arr[box], cluttered_arr[box])]
    clean_t, cluttered_t = _to_tensor(clean_arr, "cpu"), _to_tensor(cluttered_arr, "cpu")
    feats = _restored_features(encoder, run, key, clean_t, cluttered_t, [boxes[i] for i in changed], batch_size, name)
    drift = _cosine_drift(feats[1:], feats[0], name)
    drops = np.zeros(len(boxes))
    drops[changed] = drift[0] - drift[1:]
    rows, cols = math.ceil(clean_arr.shape[0] / patch), math.ceil(clean_arr.shape[1] / patch)
    return {
        "method": "occlusion",
        "map": _spread(drops, boxes, clean_arr.shape),
        "drops": drops.reshape(rows, cols),
        "drift": float(drift[0]),
        "patch": patch,
        "layer": key if layer is None else layer,
        "forward_images": 2 + len(changed),
    }
