"""What the drift maps share: the pair as pixel arrays, the tapped feature, the cosine drift."""

from __future__ import annotations

import numpy as np
import torch
from PIL import Image
from torchvision.transforms import InterpolationMode
from torchvision.transforms import functional as TF

from invariance.errors import InvalidParameter, InvarianceError
from invariance.validation import check_int

from ..encoders.encoder import Encoder
from ..encoders.extraction import _forward
from ..encoders.preprocess import MAX_RESIZED_PIXELS
from ..encoders.taps import OUTPUT_KEY, _runner, _validate_layers

# Largest image a drift map is made of, in pixels: the bound feature extraction puts on a
# resized image (invariance.encoders.preprocess.MAX_RESIZED_PIXELS, 16.8 M pixels), so a
# map holds at most a few float tensors of 200 MB.
MAX_MAP_PIXELS = MAX_RESIZED_PIXELS


def _as_rgb_array(image, what: str) -> np.ndarray:
    """A uint8 (H, W, 3) array from a PIL image or an array of that shape."""
    if isinstance(image, Image.Image):
        image = np.asarray(image.convert("RGB"))
    arr = np.asarray(image)
    if arr.dtype != np.uint8 or arr.ndim != 3 or arr.shape[2] != 3:
        raise InvarianceError(f"{what} must be an RGB image or a uint8 array of shape (H, W, 3), "
                              f"got {arr.dtype} {arr.shape}")
    return arr


def _pair_arrays(clean, cluttered, name: str) -> tuple[np.ndarray, np.ndarray]:
    """Both views as uint8 (H, W, 3) arrays of one size."""
    clean_arr = _as_rgb_array(clean, f"the clean view of {name}")
    cluttered_arr = _as_rgb_array(cluttered, f"the cluttered view of {name}")
    height, width = clean_arr.shape[:2]
    if height * width > MAX_MAP_PIXELS:
        raise InvarianceError(f"pair {name}: the image is {width} x {height} px, above the limit of "
                              f"{MAX_MAP_PIXELS:,} pixels for a drift map; downscale the pair")
    if clean_arr.shape != cluttered_arr.shape:
        raise InvarianceError(
            f"pair {name}: clean view is {clean_arr.shape[1]} x {clean_arr.shape[0]} px but cluttered is "
            f"{cluttered_arr.shape[1]} x {cluttered_arr.shape[0]} px; a drift map needs two views of one size"
        )
    return clean_arr, cluttered_arr


def _check_encoder(encoder) -> Encoder:
    """``encoder`` if it is an :class:`~invariance.encoders.Encoder` (from ``load_encoder``)."""
    if not isinstance(encoder, Encoder):
        raise InvalidParameter("encoder", f"a drift map needs an Encoder from load_encoder, "
                                          f"got {type(encoder).__name__}")
    return encoder


def _layer_runner(encoder: Encoder, layer):
    """``(run, key)``: ``run(batch)`` gives ``{key: raw activation}`` in one forward pass."""
    wanted, nodes = _validate_layers(encoder, None if layer in (None, OUTPUT_KEY) else [layer])
    return _runner(encoder, wanted, nodes), wanted[0]


def _features(encoder: Encoder, run, key: str, batch: torch.Tensor, names) -> np.ndarray:
    """Pooled float32 features (rows, D) of a preprocessed batch, refusing non-finite ones."""
    with torch.inference_mode():
        return _forward(run, encoder, batch.to(encoder.device), [key], names)[key]


def _unit(rows: np.ndarray, name: str) -> np.ndarray:
    """Rows scaled to unit length (float64); an all-zero row has no cosine."""
    rows = np.atleast_2d(rows).astype(np.float64)
    norms = np.linalg.norm(rows, axis=1)
    if not (norms > 0).all():
        raise InvarianceError(f"pair {name}: the encoder gives an all-zero feature, so the cosine drift is "
                              "undefined there; tap another layer (--layer)")
    return rows / norms[:, None]


def _cosine_drift(rows: np.ndarray, reference: np.ndarray, name: str) -> np.ndarray:
    """1 - cos(row, reference) per row, as half the squared distance of unit vectors (>= 0)."""
    diff = _unit(rows, name) - _unit(reference, name)
    return 0.5 * np.einsum("ij,ij->i", diff, diff)


def _check_patch(patch, shape, name: str) -> int:
    """The patch side in pixels; an image smaller than one patch is refused."""
    patch = check_int("patch", patch, low=1)
    height, width = shape[:2]
    if patch > min(height, width):
        raise InvarianceError(
            f"pair {name}: the image is {width} x {height} px, smaller than the {patch} px patch; "
            f"pass a patch of at most {min(height, width)} px (--patch)"
        )
    return patch


def _to_tensor(arr: np.ndarray, device) -> torch.Tensor:
    """(1, 3, H, W) float32 in [0, 1] from a uint8 (H, W, 3) array."""
    return torch.from_numpy(np.ascontiguousarray(arr.transpose(2, 0, 1))).float().div(255.0)[None].to(device)


def _preprocess(preprocess, x: torch.Tensor) -> torch.Tensor:
    """The encoder's :class:`~invariance.encoders.Preprocess` as torch operations on a batch.

    Differentiable, so the gradient map reaches the stored pixels; the occlusion map
    applies the same operations as the linear map they are (``occlusion._RestoredBatches``).
    torch's antialiased resize applies Pillow's filter but does not round to 8 bits in
    between: pixels differ from feature extraction's by at most one 8-bit step, and
    occlusion drops by about 1% of the largest drop (measured on the demo CNN; checked in
    tests/test_explain.py).
    """
    x = TF.resize(x, preprocess.resize, interpolation=InterpolationMode(preprocess.interpolation), antialias=True)
    x = TF.center_crop(x, [preprocess.crop, preprocess.crop])
    return TF.normalize(x, preprocess.mean, preprocess.std)


def _check_resized(encoder: Encoder, shape, name: str) -> None:
    """Refuse a pair whose resized image would exceed the per-image bound of feature extraction."""
    height, width = shape[:2]
    short, long = min(height, width), max(height, width)
    resize = encoder.preprocess.resize
    resized = resize * int(resize * long / short)  # torchvision's rule for the long side
    if resized > MAX_RESIZED_PIXELS:
        raise InvarianceError(f"pair {name}: the image is {width} x {height} px; resized to {resize} px on its short "
                              f"side it would hold {resized:,} pixels, above the limit of {MAX_RESIZED_PIXELS:,}; "
                              "crop it to a less elongated shape")
