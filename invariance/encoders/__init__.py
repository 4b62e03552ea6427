"""Encoder specs, loading, layer taps, batched feature extraction, feature cache and checkpoints.

An encoder is named by a *spec* string; the part before the first colon is its form:

``torchvision:NAME``
    torchvision architecture at random init. Initialisation runs under
    ``torch.manual_seed(0)`` in a forked RNG, so the same spec gives the same weights
    (and features) on every run without touching the caller's random state.
``torchvision:NAME@WEIGHTS``
    torchvision's own weights (``@IMAGENET1K_V1`` or ``@ResNet18_Weights.IMAGENET1K_V1``),
    read only from the local torch hub cache; nothing is ever downloaded.
``torchvision:NAME`` with ``weights=FILE``
    a local state dict, of the whole classifier or of the feature trunk only.
``torchscript:FILE``
    a TorchScript module (``torch.jit.save``).
``python:MODULE:CALLABLE`` or ``python:path/to/file.py:CALLABLE``
    a function called with no arguments that returns an ``nn.Module``. ``MODULE`` is
    looked up in the current folder first, as ``python -m`` does; a file may import the
    modules next to it, as ``python path/to/file.py`` may.
``checkpoint:FILE``
    a file written by :func:`save_checkpoint` (for example by ``invariance align``).

Every file is read with ``torch.load(weights_only=True)``: nothing but tensors and plain
containers is ever unpickled.

The default feature is the globally pooled feature before the classifier head (layer key
``"output"``); any torch.fx graph node can be tapped as well (:func:`available_layers`).

Submodules: :mod:`~.specs` (spec forms, :func:`load_encoder`), :mod:`~.loaders` (the
module-building forms), :mod:`~.checkpoints`, :mod:`~.preprocess`, :mod:`~.weights`
(weight files), :mod:`~.taps` (layers and pooling), :mod:`~.extraction` and
:mod:`~.cache` (the feature cache).
"""

import importlib

# Where each public name lives. Imported on first use (PEP 562), so that the feature cache
# and the request index can be read without importing torch.
_PUBLIC = {
    "CHECKPOINT_FORMAT": "checkpoints",
    "save_checkpoint": "checkpoints",
    "Encoder": "encoder",
    "resolve_device": "encoder",
    "DEFAULT_NUM_WORKERS": "extraction",
    "extract_features": "extraction",
    "RANDOM_INIT_SEED": "loaders",
    "DEFAULT_CROP": "preprocess",
    "DEFAULT_RESIZE": "preprocess",
    "IMAGENET_MEAN": "preprocess",
    "IMAGENET_STD": "preprocess",
    "Preprocess": "preprocess",
    "load_encoder": "specs",
    "OUTPUT_KEY": "taps",
    "available_layers": "taps",
}


def __getattr__(name):
    if name in _PUBLIC:
        value = getattr(importlib.import_module(f".{_PUBLIC[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return sorted([*globals(), *_PUBLIC])


__all__ = [
    "CHECKPOINT_FORMAT",
    "DEFAULT_CROP",
    "DEFAULT_NUM_WORKERS",
    "DEFAULT_RESIZE",
    "Encoder",
    "IMAGENET_MEAN",
    "IMAGENET_STD",
    "OUTPUT_KEY",
    "Preprocess",
    "RANDOM_INIT_SEED",
    "available_layers",
    "extract_features",
    "load_encoder",
    "resolve_device",
    "save_checkpoint",
]
