"""Image preprocessing of an encoder: resize, centre crop, tensor, normalisation."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch
from PIL import Image
from torchvision.transforms import InterpolationMode
from torchvision.transforms import functional as TF

from invariance.data import IMAGE_SOURCE_KEY
from invariance.errors import InvarianceError
from invariance.options import MAX_IMAGE_SIZE

# ImageNet channel statistics and the 256 -> 224 resize/crop: common practice, and what
# torchvision's ImageNet weights use (their ``transforms()`` metadata).
IMAGENET_MEAN = (0.485, 0.456, 0.406)
IMAGENET_STD = (0.229, 0.224, 0.225)
DEFAULT_RESIZE = 256
DEFAULT_CROP = 224

_INTERPOLATIONS = ("nearest", "bilinear", "bicubic")
_PREPROCESS_KEYS = {"image_size", "resize", "crop", "mean", "std", "interpolation"}
_STORED_KEYS = {"resize", "crop", "mean", "std", "interpolation"}  # what describe() writes

# The work per image is bounded, not only the pixels read: the resize scales the *shorter*
# side, so a 1 x 100000 px strip resized to 256 px would hold 256 x 25.6 M pixels (20 GB).
# An image whose resized size would exceed this many pixels is refused: four times the
# largest square preprocessing allows (MAX_IMAGE_SIZE^2), i.e. 16.8 M pixels, 48 MiB as
# 8-bit RGB. At the default 256 px resize it admits aspect ratios up to 256:1.
MAX_RESIZED_PIXELS = 4 * MAX_IMAGE_SIZE ** 2


@dataclass
class Preprocess:
    """Resize the shorter side, centre-crop a square, convert to a tensor and normalise.

    The classic ImageNet evaluation transform (Krizhevsky et al. 2012, NeurIPS; as
    torchvision's ``ImageClassification`` preset implements it).

    Parameters
    ----------
    resize : int
        Length of the shorter side after resizing, in pixels.
    crop : int
        Side of the centred square crop, at most ``resize``.
    mean, std : tuple of 3 floats
        Per-channel normalisation of the [0, 1] tensor.
    interpolation : {"bilinear", "bicubic", "nearest"}
        Resampling filter of the resize (antialiased).
    """

    resize: int
    crop: int
    mean: tuple = IMAGENET_MEAN
    std: tuple = IMAGENET_STD
    interpolation: str = "bilinear"

    def __post_init__(self):
        self.resize = _pixels("resize", self.resize)
        self.crop = _pixels("crop", self.crop)
        if self.crop > self.resize:
            raise InvarianceError(
                f"preprocess crop {self.crop} px is larger than resize {self.resize} px; "
                "use a crop no larger than the resize"
            )
        self.mean = _triple("mean", self.mean)
        self.std = _triple("std", self.std)
        if min(self.std) <= 0:
            raise InvarianceError(f"preprocess std must be positive, got {self.std}")
        if not isinstance(self.interpolation, str) or self.interpolation not in _INTERPOLATIONS:
            raise InvarianceError(
                f"preprocess interpolation {self.interpolation!r} is not one of {', '.join(_INTERPOLATIONS)}"
            )

    def __call__(self, img: Image.Image) -> torch.Tensor:
        """The (3, crop, crop) float32 tensor of an RGB image.

        Raises
        ------
        InvarianceError
            The image is so elongated that its resized version would hold more than
            :data:`MAX_RESIZED_PIXELS` pixels; the message names its file when
            :func:`invariance.data.load_rgb` read it.
        """
        self._check_budget(img)
        img = TF.resize(img, self.resize, interpolation=InterpolationMode(self.interpolation), antialias=True)
        img = TF.center_crop(img, [self.crop, self.crop])
        return TF.normalize(TF.to_tensor(img), self.mean, self.std)

    def _check_budget(self, img: Image.Image) -> None:
        width, height = img.size
        short, long = min(width, height), max(width, height)
        if short < 1:
            raise InvarianceError(f"{_source(img)} has no pixels ({width} x {height}); replace the image")
        resized = self.resize * int(self.resize * long / short)  # torchvision's rule for the long side
        if resized > MAX_RESIZED_PIXELS:
            raise InvarianceError(
                f"{_source(img)} is {width} x {height} px: resized to {self.resize} px on its short side it would "
                f"hold {resized:,} pixels, above the limit of {MAX_RESIZED_PIXELS:,} per image; crop it to an "
                f"aspect ratio under {MAX_RESIZED_PIXELS // self.resize ** 2}:1"
            )

    def describe(self) -> dict:
        """JSON-able settings; ``Preprocess(**describe())`` builds the same preprocessing.

        Returns
        -------
        dict
            ``{"resize", "crop", "mean", "std", "interpolation"}``.
        """
        return {
            "resize": self.resize,
            "crop": self.crop,
            "mean": list(self.mean),
            "std": list(self.std),
            "interpolation": self.interpolation,
        }

    @classmethod
    def from_weights(cls, weights) -> "Preprocess":
        """Preprocessing from a torchvision weights enum's own ``transforms()`` metadata.

        Parameters
        ----------
        weights : torchvision.models.WeightsEnum
            A member such as ``ResNet18_Weights.IMAGENET1K_V1``.

        Returns
        -------
        Preprocess
        """
        tf = weights.transforms()
        return cls(
            resize=int(tf.resize_size[0]),
            crop=int(tf.crop_size[0]),
            mean=tuple(tf.mean),
            std=tuple(tf.std),
            interpolation=tf.interpolation.value,
        )

    @classmethod
    def from_dict(cls, info: dict, *, source: str) -> "Preprocess":
        """Preprocessing from a module's ``invariance_preprocess`` settings.

        Parameters
        ----------
        info : dict
            Keys among ``image_size`` (resize and crop alike), ``resize``, ``crop``,
            ``mean``, ``std`` and ``interpolation``; missing keys fall back to the ImageNet
            defaults.
        source : str
            What the settings came from, named in error messages.

        Returns
        -------
        Preprocess
        """
        if not isinstance(info, dict) or not set(info) <= _PREPROCESS_KEYS:
            extra = sorted(map(str, set(info) - _PREPROCESS_KEYS)) if isinstance(info, dict) else type(info).__name__
            raise InvarianceError(
                f"{source}: invariance_preprocess must be a dict with keys among "
                f"{sorted(_PREPROCESS_KEYS)}, got {extra}"
            )
        size = info.get("image_size")
        return _built(source, "fix its invariance_preprocess",
                      resize=info.get("resize", size if size is not None else DEFAULT_RESIZE),
                      crop=info.get("crop", size if size is not None else DEFAULT_CROP),
                      mean=info.get("mean", IMAGENET_MEAN), std=info.get("std", IMAGENET_STD),
                      interpolation=info.get("interpolation", "bilinear"))

    @classmethod
    def from_description(cls, info, *, source: str) -> "Preprocess":
        """Preprocessing from what :meth:`describe` wrote (a checkpoint's ``preprocess``).

        Parameters
        ----------
        info : dict
            Exactly the keys ``resize``, ``crop``, ``mean``, ``std`` and ``interpolation``.
        source : str
            The file the settings came from, named in error messages.

        Returns
        -------
        Preprocess
        """
        if not isinstance(info, dict) or set(info) != _STORED_KEYS:
            got = sorted(map(str, info)) if isinstance(info, dict) else type(info).__name__
            raise InvarianceError(f"{source}: its preprocess settings must have exactly the keys "
                                  f"{sorted(_STORED_KEYS)}, got {got}; write the file again with save_checkpoint")
        return _built(source, "write the file again with save_checkpoint", **info)


def _built(source: str, fix: str, **settings) -> Preprocess:
    """``Preprocess(**settings)`` with ``source`` and ``fix`` in any error."""
    try:
        return Preprocess(**settings)
    except InvarianceError as exc:
        raise InvarianceError(f"{source}: {exc}; {fix}") from None


def _source(img: Image.Image) -> str:
    """The file an image was read from, or its size when unknown (for messages)."""
    return str(img.info.get(IMAGE_SOURCE_KEY) or "an image")


def _module_preprocess(info, spec: str) -> Preprocess:
    """A module's own preprocessing (``invariance_preprocess``), else the ImageNet default."""
    if info is None:
        return Preprocess(DEFAULT_RESIZE, DEFAULT_CROP)
    # TorchScript keeps a dict attribute as its own mapping type.
    return Preprocess.from_dict(dict(info) if hasattr(info, "items") else info, source=spec)


def _pixels(name: str, value) -> int:
    """An image side from 1 to :data:`~invariance.options.MAX_IMAGE_SIZE` pixels."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or not 1 <= value <= MAX_IMAGE_SIZE:
        raise InvarianceError(f"preprocess {name} must be a whole number of pixels from 1 to {MAX_IMAGE_SIZE}, "
                              f"got {value!r}")
    return int(value)


def _triple(name: str, value) -> tuple:
    try:
        out = tuple(float(v) for v in value) if not isinstance(value, (str, bytes)) else ()
    except (TypeError, ValueError, OverflowError):
        out = ()
    if len(out) != 3 or not all(np.isfinite(out)):
        raise InvarianceError(f"preprocess {name} must be 3 numbers (finite, one per RGB channel), got {value!r:.80}")
    return out
