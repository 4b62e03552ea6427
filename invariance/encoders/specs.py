"""Encoder specs: which form a spec string is, and loading the encoder it names."""

from __future__ import annotations

import dataclasses
import os
from typing import Callable

import torchvision

from invariance.errors import InvalidParameter, InvarianceError
from invariance.validation import check_int

from .checkpoints import _load_checkpoint
from .encoder import Encoder, resolve_device
from .loaders import _MODULE_LOADERS
from .spec_forms import FORMS, FORMS_HINT as _FORMS_HINT
from .spec_forms import split_spec as _split_spec

_LOADERS: dict[str, Callable[..., Encoder]] = {**_MODULE_LOADERS, "checkpoint": _load_checkpoint}
if set(_LOADERS) != set(FORMS):  # the command line checks forms against FORMS without importing torch
    raise RuntimeError("invariance.encoders.spec_forms.FORMS must name every loader")


def load_encoder(
    spec: str,
    *,
    weights: str | os.PathLike | None = None,
    device: str = "auto",
    image_size: int | None = None,
    trusted_code=(),
) -> Encoder:
    """Load the encoder named by ``spec`` in eval mode on ``device``.

    Parameters
    ----------
    spec : str
        One of the spec forms listed in :mod:`invariance.encoders`.
    weights : path, optional
        A local state dict for a ``torchvision:NAME`` spec.
    device : {"auto", "cpu", "cuda"}
    image_size : int, optional
        Resize the shorter side to ``image_size`` and centre-crop an ``image_size`` square
        (no crop margin on square images); overrides the weights' own preprocessing.
    trusted_code : sequence of str, default=()
        ``python:`` specs that a ``checkpoint:`` file may name as its source and that may
        therefore be imported; a checkpoint naming any other code is refused.

    Returns
    -------
    Encoder

    Raises
    ------
    InvarianceError
        Unknown form or architecture (with close names), missing file, weights that do not
        fit the architecture, missing hub weights, or a ``python:`` callable that fails.
    """
    kind, rest = _split_spec(spec)
    image_size = check_int("image_size", image_size, low=1, allow_none=True)
    if weights is not None and kind != "torchvision":
        raise InvalidParameter("weights", f"weights={weights} only applies to torchvision:NAME specs, not {spec}")
    dev = resolve_device(device)
    if isinstance(trusted_code, str) or not all(isinstance(t, str) for t in trusted_code):
        raise InvalidParameter("trusted_code", f"trusted_code={trusted_code!r} is not valid; pass a list of "
                                               "python: specs")
    if kind == "checkpoint":
        enc = _load_checkpoint(spec, rest, weights, trusted_code=tuple(trusted_code))
    else:
        enc = _LOADERS[kind](spec, rest, weights)
    if image_size is not None:
        enc.preprocess = dataclasses.replace(enc.preprocess, resize=image_size, crop=image_size)
    _check_input_size(enc)
    enc.module = enc.module.to(dev).eval()
    enc.device = dev
    return enc


def _min_input_size(arch: str | None) -> int | None:
    # torchvision records the smallest input each architecture accepts in its weights metadata.
    if arch is None:
        return None
    sizes = [min(w.meta.get("min_size", (1, 1))) for w in torchvision.models.get_model_weights(arch)]
    return min(sizes) if sizes else None


def _check_input_size(enc: Encoder) -> None:
    crop = enc.preprocess.crop
    fixed = getattr(enc.module, "image_size", None)  # e.g. torchvision's VisionTransformer
    if isinstance(fixed, int) and fixed != crop:
        raise InvarianceError(
            f"encoder {enc.spec} takes exactly {fixed} px inputs but preprocessing gives {crop} px; "
            f"pass image_size=None or image_size={fixed}"
        )
    smallest = _min_input_size(enc.arch)
    if smallest and crop < smallest:
        raise InvarianceError(
            f"encoder {enc.spec} needs inputs of at least {smallest} px (torchvision's weights metadata) "
            f"but preprocessing gives {crop} px; pass image_size={smallest} or larger"
        )
