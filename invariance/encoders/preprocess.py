"""Image preprocessing of an encoder: resize, centre crop, tensor, normalisation."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch
from PIL import Image
from torchvision.transforms import InterpolationMode
from torchvision.transforms import functional as TF

from invariance.errors import InvarianceError

# ImageNet channel statistics and the 256 -> 224 resize/crop: common practice, and what
# torchvision's ImageNet weights use (their ``transforms()`` metadata).
IMAGENET_MEAN = (0.485, 0.456, 0.406)
IMAGENET_STD = (0.229, 0.224, 0.225)
DEFAULT_RESIZE = 256
DEFAULT_CROP = 224

_INTERPOLATIONS = ("nearest", "bilinear", "bicubic")
_PREPROCESS_KEYS = {"image_size", "resize", "crop", "mean", "std", "interpolation"}


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
        self.resize = _positive_int("resize", self.resize)
        self.crop = _positive_int("crop", self.crop)
        if self.crop > self.resize:
            raise InvarianceError(
                f"preprocess crop {self.crop} px is larger than resize {self.resize} px; "
                "use a crop no larger than the resize"
            )
        self.mean = _triple("mean", self.mean)
        self.std = _triple("std", self.std)
        if min(self.std) <= 0:
            raise InvarianceError(f"preprocess std must be positive, got {self.std}")
        if self.interpolation not in _INTERPOLATIONS:
            raise InvarianceError(
                f"preprocess interpolation {self.interpolation!r} is not one of {', '.join(_INTERPOLATIONS)}"
            )

    def __call__(self, img: Image.Image) -> torch.Tensor:
        """The (3, crop, crop) float32 tensor of an RGB image."""
        img = TF.resize(img, self.resize, interpolation=InterpolationMode(self.interpolation), antialias=True)
        img = TF.center_crop(img, [self.crop, self.crop])
        return TF.normalize(TF.to_tensor(img), self.mean, self.std)

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
            extra = sorted(set(info) - _PREPROCESS_KEYS) if isinstance(info, dict) else type(info).__name__
            raise InvarianceError(
                f"{source}: invariance_preprocess must be a dict with keys among "
                f"{sorted(_PREPROCESS_KEYS)}, got {extra}"
            )
        size = info.get("image_size")
        return cls(
            resize=info.get("resize", size if size is not None else DEFAULT_RESIZE),
            crop=info.get("crop", size if size is not None else DEFAULT_CROP),
            mean=tuple(info.get("mean", IMAGENET_MEAN)),
            std=tuple(info.get("std", IMAGENET_STD)),
            interpolation=info.get("interpolation", "bilinear"),
        )


def _module_preprocess(info, spec: str) -> Preprocess:
    """A module's own preprocessing (``invariance_preprocess``), else the ImageNet default."""
    if info is None:
        return Preprocess(DEFAULT_RESIZE, DEFAULT_CROP)
    # TorchScript keeps a dict attribute as its own mapping type.
    return Preprocess.from_dict(dict(info) if hasattr(info, "items") else info, source=spec)


def _positive_int(name: str, value) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise InvarianceError(f"preprocess {name} must be a positive integer number of pixels, got {value!r}")
    return int(value)


def _triple(name: str, value) -> tuple:
    try:
        out = tuple(float(v) for v in value)
    except (TypeError, ValueError):
        out = ()
    if len(out) != 3:
        raise InvarianceError(f"preprocess {name} must be 3 numbers (one per RGB channel), got {value!r}")
    return out
