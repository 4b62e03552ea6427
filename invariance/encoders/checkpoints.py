"""Checkpoints: a module's weights with the spec that rebuilds its architecture.

A checkpoint is a ``torch.save``'d dict that ``torch.load(weights_only=True)`` reads back:
``format``, ``source_spec``/``source_weights`` (the encoder it was derived from), ``arch``,
``preprocess``, ``state_dict`` and free-form ``metadata``. ``checkpoint:FILE`` specs load it.
"""

from __future__ import annotations

import io
import re
from pathlib import Path

import torch

from invariance._io import atomic_write_bytes
from invariance.errors import InvarianceError

from .encoder import Encoder
from .loaders import _MODULE_LOADERS
from .preprocess import Preprocess
from .weights import _existing_file, _file_sha256, _load_state, _torch_load

CHECKPOINT_FORMAT = "invariance.checkpoint/1"

_WRITE_IT = "write it with save_checkpoint or invariance align"


def save_checkpoint(path, *, encoder: Encoder, module: torch.nn.Module, metadata: dict) -> Path:
    """Write ``module``'s weights as a checkpoint that ``checkpoint:PATH`` loads.

    Parameters
    ----------
    path : path
        Output file, written atomically (a failure leaves no partial file).
    encoder : Encoder
        The encoder ``module`` was derived from; its source spec rebuilds the architecture.
    module : torch.nn.Module
        Same architecture as ``encoder.module`` (for example after alignment).
    metadata : dict
        Anything ``torch.load(weights_only=True)`` can read back (numbers, strings, lists, dicts).

    Returns
    -------
    Path
    """
    if not isinstance(encoder, Encoder):
        raise InvarianceError(f"save_checkpoint needs an Encoder, got {type(encoder).__name__}")
    if not isinstance(module, torch.nn.Module):
        raise InvarianceError(f"save_checkpoint needs a torch.nn.Module, got {type(module).__name__}")
    if not isinstance(metadata, dict):
        raise InvarianceError(f"save_checkpoint metadata must be a dict, got {type(metadata).__name__}")
    payload = {
        "format": CHECKPOINT_FORMAT,
        "source_spec": encoder.source.get("spec", encoder.spec),
        "source_weights": encoder.source.get("weights"),
        "arch": encoder.arch,
        "preprocess": encoder.preprocess.describe(),
        "state_dict": {k: v.detach().cpu().clone() for k, v in module.state_dict().items()},
        "metadata": metadata,
    }
    buf = io.BytesIO()
    torch.save(payload, buf)
    return atomic_write_bytes(path, buf.getvalue())


def _load_checkpoint(spec: str, rest: str, weights, trusted_code=()) -> Encoder:
    """``checkpoint:FILE``: rebuild the source architecture, then load every weight.

    A ``python:`` source is code named inside the file: it is imported only when the
    caller lists that exact spec in ``trusted_code``.
    """
    path = _existing_file(rest, spec)
    ckpt = _torch_load(path, "checkpoint", _WRITE_IT)
    if not isinstance(ckpt, dict) or ckpt.get("format") != CHECKPOINT_FORMAT:
        raise InvarianceError(f"{path} is not an invariance checkpoint ({CHECKPOINT_FORMAT}); {_WRITE_IT}")
    _check_trusted(path, ckpt.get("source_spec"), trusted_code)
    # Everything read from the file is checked before the source is rebuilt (cheap first).
    preprocess = Preprocess.from_description(ckpt.get("preprocess"), source=f"checkpoint {path}")
    state = _stored_state(path, ckpt.get("state_dict"))
    base = _rebuild_source(path, ckpt)
    if base.arch != ckpt.get("arch"):
        raise InvarianceError(
            f"checkpoint {path} was saved from architecture {ckpt.get('arch')!r} but its source "
            f"{ckpt['source_spec']} now builds {base.arch!r}; restore the source encoder"
        )
    _load_state(base.module, state, source=str(path), target=ckpt["source_spec"])
    return Encoder(
        spec=spec, module=base.module.eval(), preprocess=preprocess,
        weights_sha256=_file_sha256(path), arch=base.arch, device=torch.device("cpu"), weights=str(path),
        kind="checkpoint", layout=base.layout, source=dict(base.source), code_sha256=base.code_sha256,
        aligned_on=_aligned_on(ckpt.get("metadata")),
    )


def _aligned_on(metadata) -> str | None:
    """The content hash of the pairs an ``align`` checkpoint was trained on, if it is a plain hex string."""
    value = metadata.get("data_content_hash") if isinstance(metadata, dict) else None
    if isinstance(value, str) and 0 < len(value) <= 128 and all(c in "0123456789abcdef" for c in value):
        return value
    return None


def _stored_state(path: Path, state) -> dict:
    """The checkpoint's ``state_dict``: a dict of tensors named by strings."""
    if not isinstance(state, dict) or not all(isinstance(k, str) and isinstance(v, torch.Tensor)
                                              for k, v in state.items()):
        got = {type(None): "none", dict: "a dict holding other things"}.get(type(state), type(state).__name__)
        raise InvarianceError(f"checkpoint {path} holds no state_dict of named tensors (found {got}); {_WRITE_IT}")
    return state


# The package's own modules (the demo encoders) are not foreign code.
_OWN_MODULES = re.compile(r"^python:invariance(\.[A-Za-z_][A-Za-z0-9_]*)+:[A-Za-z_][A-Za-z0-9_]*$")


def _check_trusted(path: Path, source, trusted_code) -> None:
    if not isinstance(source, str) or not source.startswith("python:") or source in trusted_code:
        return
    if _OWN_MODULES.match(source):
        return
    target = source[len("python:"):].rpartition(":")[0]
    raise InvarianceError(
        f"checkpoint {path} was made from {source}: loading it would import and run {target}, code named inside "
        f"the file; only if you trust that code, pass trusted_code=[{source!r}] (--trust-code {source})"
    )


def _rebuild_source(path: Path, ckpt: dict) -> Encoder:
    source = ckpt.get("source_spec")
    kind, _, rest = source.partition(":") if isinstance(source, str) else ("", "", "")
    if kind not in _MODULE_LOADERS:
        raise InvarianceError(f"checkpoint {path} names no usable source encoder ({source!r}); {_WRITE_IT}")
    # The checkpoint holds every weight, so a torchvision source needs only its architecture,
    # not the weights file it was first loaded from.
    enc = _MODULE_LOADERS[kind](source, rest, None)
    enc.source = {"spec": source, "weights": ckpt.get("source_weights")}
    return enc
