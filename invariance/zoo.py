"""The demo encoders: a compact CNN for 64 px views of the parts-sorting workbench.

Two trained copies ship with the package so the demo runs offline without downloads:

* ``clean_only_encoder`` saw clean workbench images only (the usual situation: the
  encoder was trained on a tidy table and will meet a cluttered one);
* ``clutter_augmented_encoder`` saw a random mix of clean and cluttered views of the same
  scenes (clutter used as data augmentation).

Both load as encoder specs::

    python:invariance.zoo:clean_only_encoder
    python:invariance.zoo:clutter_augmented_encoder

The weights are retrained with ``python -m invariance.train_demo --out invariance/weights``
(see :mod:`invariance.train_demo`); the table :data:`SHIPPED_WEIGHTS` records each file's
SHA-256 so a stale or damaged file is refused rather than silently used.
"""

from __future__ import annotations

from collections import OrderedDict
from pathlib import Path

import torch
from torch import nn

from ._io import file_sha256
from .errors import InvarianceError

IMAGE_SIZE = 64
# Pixels in [0, 1] are centred on mid-grey and scaled to roughly unit spread
# (common practice; the workbench scenes have no data set statistics worth freezing in).
PREPROCESS = {"image_size": IMAGE_SIZE, "mean": (0.5, 0.5, 0.5), "std": (0.25, 0.25, 0.25)}
FEATURE_MULTIPLIER = 4  # pooled feature size = 4 * width (128 for the default width 32)
WEIGHTS_DIR = Path(__file__).resolve().parent / "weights"
RETRAIN_COMMAND = "python -m invariance.train_demo --out invariance/weights"

# name -> shipped weight file and its SHA-256 (data, so adding an encoder adds a row).
SHIPPED_WEIGHTS = {
    "clean_only": {
        "file": "workbench_clean_only.pt",
        "sha256": "13ed3ca8e3405ae5691bad211999a5a7f22d470d52b0fa017ac18d5861ffb44a",
        "trained_on": "clean workbench views only",
    },
    "clutter_augmented": {
        "file": "workbench_clutter_aug.pt",
        "sha256": "1e066b8fbd1899f7e3aa2a9600f7ff3d213df97de10516dcfce03c2aa608451c",
        "trained_on": "a random mix of clean and cluttered views of the same scenes",
    },
}


def _conv_bn_relu(c_in: int, c_out: int, stride: int) -> list[nn.Module]:
    return [
        nn.Conv2d(c_in, c_out, kernel_size=3, stride=stride, padding=1, bias=False),
        nn.BatchNorm2d(c_out),
        nn.ReLU(inplace=True),
    ]


def _block(c_in: int, c_out: int) -> nn.Sequential:
    # Downsample then refine: two 3x3 convolutions, the VGG-style unit (Simonyan &
    # Zisserman, ICLR 2015) with batch normalisation (Ioffe & Szegedy, ICML 2015).
    return nn.Sequential(*_conv_bn_relu(c_in, c_out, 2), *_conv_bn_relu(c_out, c_out, 1))


def workbench_cnn(width: int = 32) -> nn.Sequential:
    """A compact CNN that maps 64 px workbench images to a pooled feature vector.

    The forward pass is a plain sequence of named stages (``stem``, ``block1``,
    ``block2``, ``block3``, ``pool``, ``flatten``), so any stage can be the point where
    alignment starts training (``--train-from block3``).

    Parameters
    ----------
    width : int, default=32
        Channels of the stem; the blocks use ``width``, ``2 * width`` and ``4 * width``
        channels, so the feature vector has ``4 * width`` entries (128 by default).

    Returns
    -------
    torch.nn.Sequential
        Untrained network, input ``(N, 3, H, W)`` normalised with :data:`PREPROCESS`,
        output ``(N, 4 * width)``. It carries ``invariance_preprocess`` (image size, mean,
        std) which the encoder loader uses as its preprocessing.
    """
    if isinstance(width, bool) or not isinstance(width, int) or not 4 <= width <= 256:
        raise InvarianceError(f"width={width!r} is not valid; pass an integer between 4 and 256")
    # 64 px input: stem 32 px, block1 16 px, block2 8 px, block3 4 px.
    net = nn.Sequential(
        OrderedDict(
            [
                ("stem", nn.Sequential(*_conv_bn_relu(3, width, 2))),
                ("block1", _block(width, width)),
                ("block2", _block(width, 2 * width)),
                ("block3", _block(2 * width, FEATURE_MULTIPLIER * width)),
                ("pool", nn.AdaptiveAvgPool2d(1)),
                ("flatten", nn.Flatten(1)),
            ]
        )
    )
    net.invariance_preprocess = dict(PREPROCESS)
    return net


def _load_shipped(name: str) -> nn.Sequential:
    entry = SHIPPED_WEIGHTS[name]
    path = WEIGHTS_DIR / entry["file"]
    if not path.is_file():
        raise InvarianceError(f"{path}: shipped demo weights are missing; run `{RETRAIN_COMMAND}`")
    if entry["sha256"] is not None and file_sha256(path) != entry["sha256"]:
        raise InvarianceError(
            f"{path}: SHA-256 differs from invariance.zoo.SHIPPED_WEIGHTS; reinstall the package "
            f"or run `{RETRAIN_COMMAND}` and update the table"
        )
    state = torch.load(path, map_location="cpu", weights_only=True)
    net = workbench_cnn()
    try:
        net.load_state_dict({k: v.float() if v.is_floating_point() else v for k, v in state.items()})
    except RuntimeError:
        raise InvarianceError(
            f"{path}: weights do not fit workbench_cnn(width=32); run `{RETRAIN_COMMAND}`"
        ) from None
    return net.eval()


def clean_only_encoder() -> nn.Sequential:
    """The workbench CNN trained on clean views only (the demo's weak encoder)."""
    return _load_shipped("clean_only")


def clutter_augmented_encoder() -> nn.Sequential:
    """The workbench CNN trained with cluttered views as augmentation."""
    return _load_shipped("clutter_augmented")


# ---------------------------------------------------------------- alignment panel architectures
# Architectures the alignment is developed and tested against besides the workbench CNN
# (docs/alignment.md, "Panel"). Untrained here; the tests train them on clean scenes.


def sequential_cnn(image_size: int = IMAGE_SIZE) -> nn.Sequential:
    """A plain ``nn.Sequential`` CNN with integer-named children, no batch normalisation.

    Three conv + ReLU + max-pool stages (16, 32, 64 channels) and a global average pool:
    the kind of small network a user writes by hand.

    Parameters
    ----------
    image_size : int, default=64
        Input side in pixels (recorded in ``invariance_preprocess``).

    Returns
    -------
    torch.nn.Sequential
        Output ``(N, 64)``.
    """
    net = nn.Sequential(
        nn.Conv2d(3, 16, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2),
        nn.Conv2d(16, 32, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2),
        nn.Conv2d(32, 64, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(1),
    )
    net.invariance_preprocess = {**PREPROCESS, "image_size": image_size}
    return net


def digits_cnn() -> nn.Sequential:
    """:func:`sequential_cnn` for 32 px digit images."""
    return sequential_cnn(32)


def resnet18_64() -> nn.Module:
    """torchvision's ResNet-18 (random init, no head) for 64 px images; output ``(N, 512)``."""
    import torchvision

    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(0)  # the caller's global random state stays as it was
        net = torchvision.models.resnet18(weights=None)
    net.fc = nn.Identity()
    net.invariance_preprocess = dict(PREPROCESS)
    return net


def small_vit() -> nn.Module:
    """A small torchvision VisionTransformer (64 px, 8 px patches, 4 layers, width 64); output ``(N, 64)``.

    Its forward prepends a class token and adds position embeddings between its children,
    so it is not a plain chain of them (alignment splits it with torch.fx).
    """
    from torchvision.models import VisionTransformer

    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(0)
        net = VisionTransformer(image_size=IMAGE_SIZE, patch_size=8, num_layers=4, num_heads=4, hidden_dim=64,
                                mlp_dim=128, num_classes=1)
    net.heads = nn.Identity()
    net.invariance_preprocess = dict(PREPROCESS)
    return net
