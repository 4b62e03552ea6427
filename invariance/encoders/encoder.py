"""The loaded encoder and the device it runs on."""

from __future__ import annotations

from dataclasses import dataclass, field

import torch

from invariance.errors import InvalidParameter, InvarianceError

from .preprocess import Preprocess
from .taps import OUTPUT_KEY, _pool


@dataclass
class Encoder:
    """A loaded encoder: an eval-mode module, its preprocessing and where it came from.

    Attributes
    ----------
    spec : str
        The spec as the user wrote it.
    module : torch.nn.Module
        Eval-mode module on ``device``. For torchvision specs it returns the pooled
        feature before the head, (N, D). A ``torchscript:``/``python:`` module returns
        whatever it returns; call the encoder itself (``encoder(x)``) for (N, D).
    preprocess : Preprocess
    weights_sha256 : str or None
        SHA-256 of the weights file read (hub file, ``weights=`` file, TorchScript file or
        checkpoint); ``None`` for random init and ``python:`` modules.
    arch : str or None
        torchvision architecture name when known.
    device : torch.device
    weights : str or None
        The weights read: a file path or a torchvision weights name.
    kind : str
        The spec form: torchvision, torchscript, python or checkpoint.
    layout : str
        "nchw" or "nhwc": how 4-D activations of this architecture are laid out.
    source : dict
        ``{"spec", "weights"}`` that rebuild the architecture (the checkpoint's source
        for ``checkpoint:`` specs), used by :func:`save_checkpoint`.
    code_sha256 : str or None
        SHA-256 of the Python file that built a ``python:`` module.
    aligned_on : str or None
        For a checkpoint written by ``align``: the content hash of the image set it was
        aligned on, so scoring it on those same pairs can be flagged.
    """

    spec: str
    module: torch.nn.Module
    preprocess: Preprocess
    weights_sha256: str | None
    arch: str | None
    device: torch.device
    weights: str | None = None
    kind: str = "torchvision"
    layout: str = "nchw"
    source: dict = field(default_factory=dict)
    code_sha256: str | None = None
    aligned_on: str | None = None

    def __call__(self, x: torch.Tensor) -> torch.Tensor:
        """Pooled (N, D) features of a preprocessed batch on ``device``."""
        return _pool(self.module(x), self.layout, OUTPUT_KEY, self.spec)

    def describe(self) -> dict:
        """JSON-able description for the result file.

        Returns
        -------
        dict
            ``{"spec", "arch", "weights", "weights_sha256", "preprocess", "device"}``, and
            ``"aligned_on"`` for a checkpoint that records its alignment pairs.
        """
        info = {
            "spec": self.spec,
            "arch": self.arch,
            "weights": self.weights,
            "weights_sha256": self.weights_sha256,
            "preprocess": self.preprocess.describe(),
            "device": str(self.device),
        }
        if self.aligned_on:
            info["aligned_on"] = self.aligned_on
        return info


def resolve_device(device: str = "auto") -> torch.device:
    """The torch device named by ``device``.

    Parameters
    ----------
    device : str, default="auto"
        ``"auto"`` (CUDA when available, else CPU), ``"cpu"``, ``"cuda"`` or ``"cuda:N"``.

    Returns
    -------
    torch.device
    """
    if not isinstance(device, str):
        raise InvalidParameter("device", f"device={device!r} is not valid; pass auto, cpu or cuda")
    name = device.strip().lower()
    if name == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
    if name == "cpu":
        return torch.device("cpu")
    if name == "cuda" or name.startswith("cuda:"):
        return _cuda_device(device, name)
    raise InvalidParameter("device", f"device={device!r} is not one of auto, cpu, cuda")


def _cuda_device(device: str, name: str) -> torch.device:
    if not torch.cuda.is_available():
        raise InvarianceError(f"device={device!r}: no CUDA device is available here; pass device='cpu' or 'auto'")
    try:
        dev = torch.device(name)
    except RuntimeError:
        raise InvalidParameter("device", f"device={device!r} is not a valid device; pass cuda or cuda:N") from None
    if dev.index is not None and dev.index >= torch.cuda.device_count():
        raise InvalidParameter(
            "device", f"device={device!r}: only {torch.cuda.device_count()} CUDA device(s) here; pass cuda:0"
        )
    return dev
