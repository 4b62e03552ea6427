"""Weight files: safe reading, state dicts, strict loading and content hashes."""

from __future__ import annotations

import hashlib
from pathlib import Path

import torch

from invariance._io import file_sha256 as _file_sha256
from invariance.errors import InvarianceError

from .messages import _first_line, _is_refused_load, _refused_load_reason


def _existing_file(value, what: str) -> Path:
    """``value`` as a path to an existing file; ``what`` names it in the error."""
    path = Path(value).expanduser()
    if not path.is_file():
        raise InvarianceError(f"{what}: file not found: {path}; check the path")
    return path


def _state_sha256(module: torch.nn.Module) -> str:
    """SHA-256 over every parameter and buffer (name, dtype, shape, bytes)."""
    digest = hashlib.sha256()
    for name, value in sorted(module.state_dict().items()):
        if not isinstance(value, torch.Tensor):
            continue
        tensor = value.detach().cpu().contiguous()
        digest.update(f"{name}|{tensor.dtype}|{tuple(tensor.shape)}|".encode())
        digest.update(tensor.view(-1).view(torch.uint8).numpy().tobytes() if tensor.numel() else b"")
    return digest.hexdigest()


def _torch_load(path: Path, what: str, fix: str):
    """``torch.load`` restricted to tensors and plain containers (``weights_only=True``).

    Parameters
    ----------
    path : Path
        The file to read.
    what : str
        What the file is meant to be ("weights file", "checkpoint"), for the message.
    fix : str
        How the user makes a readable file, ending the message.

    Returns
    -------
    object
        What the file holds.

    Raises
    ------
    InvarianceError
        One line naming the file and ``fix``. torch's own advice to retry with
        ``weights_only=False`` is dropped: invariance never unpickles arbitrary objects.
    """
    try:
        return torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # noqa: BLE001 - pickle, zip and torch errors alike
        if _is_refused_load(exc):
            reason = f"it {_refused_load_reason(exc)}, and invariance never unpickles other objects"
        else:
            reason = _first_line(exc)
        raise InvarianceError(f"cannot read {what} {path} ({reason}); {fix}") from None


def _read_state_dict(path: Path) -> dict:
    """The tensors of a state-dict file, unwrapped from the usual training-script layouts."""
    obj = _torch_load(path, "weights file", "pass a torch.save'd model.state_dict()")
    # Training scripts often wrap the weights (common practice): {"state_dict": ...}/{"model": ...}.
    for wrapper in ("state_dict", "model"):
        if isinstance(obj, dict) and isinstance(obj.get(wrapper), dict):
            obj = obj[wrapper]
    if not isinstance(obj, dict) or not all(isinstance(k, str) and isinstance(v, torch.Tensor) for k, v in obj.items()):
        raise InvarianceError(f"weights file {path} holds no state_dict of tensors; save model.state_dict()")
    # nn.DataParallel / DistributedDataParallel prefix every key with "module." (common practice).
    if obj and all(k.startswith("module.") for k in obj):
        obj = {k[len("module."):]: v for k, v in obj.items()}
    return obj


def _load_state(module: torch.nn.Module, state: dict, *, source: str, target: str, drop=()) -> None:
    """``load_state_dict(strict=True)`` after dropping head keys, with a one-line mismatch report."""
    prefixes = tuple(f"{p}." for p in drop)
    state = {k: v for k, v in state.items() if not k.startswith(prefixes)} if prefixes else state
    own = module.state_dict()
    missing = [k for k in own if k not in state]
    unexpected = [k for k in state if k not in own]
    shapes = [
        f"{k} {tuple(state[k].shape)} vs {tuple(own[k].shape)}"
        for k in own
        if k in state and tuple(state[k].shape) != tuple(own[k].shape)
    ]
    problems = [
        f"{label} {', '.join(keys[:3])}{' ...' if len(keys) > 3 else ''}"
        for label, keys in (("missing keys", missing), ("unexpected keys", unexpected), ("shape mismatch", shapes))
        if keys
    ]
    if problems:
        raise InvarianceError(
            f"weights {source} do not fit {target}: {'; '.join(problems)}; "
            "check that the file was saved from this architecture"
        )
    try:
        module.load_state_dict(state, strict=True)
    except (RuntimeError, TypeError, ValueError) as exc:  # e.g. a tensor type that cannot be copied in
        raise InvarianceError(f"weights {source} do not fit {target} ({_first_line(exc)}); "
                              "check that the file was saved from this architecture") from None
