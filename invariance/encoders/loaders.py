"""Loaders of the spec forms that build a module: ``torchvision:``, ``torchscript:``, ``python:``.

Each loader takes ``(spec, rest, weights)``, where ``rest`` is the spec after its form
prefix, and returns an :class:`Encoder` on the CPU; :func:`load_encoder` moves it to its
device. ``checkpoint:`` specs are loaded by :mod:`invariance.encoders.checkpoints`.
"""

from __future__ import annotations

import contextlib
import difflib
import hashlib
import importlib
import importlib.util
import json
import os
import re
import sys
import warnings
from pathlib import Path
from typing import Callable
from urllib.parse import urlparse

import torch
import torchvision

from invariance.errors import InvarianceError

from .encoder import Encoder
from .messages import _described, _first_line
from .preprocess import DEFAULT_CROP, DEFAULT_RESIZE, Preprocess, _module_preprocess
from .weights import _existing_file, _file_sha256, _load_state, _read_state_dict, _torch_load

# Seed of every random initialisation, so the same spec gives the same weights (and
# features) on every run (common practice: any fixed seed does).
RANDOM_INIT_SEED = 0

# Per torchvision family: the attribute(s) replaced by Identity so the model returns the
# pooled feature before the head, and the layout of 4-D activations of its graph nodes.
# Longest matching name prefix wins. Read off each torchvision model's forward().
_FAMILIES: dict[str, tuple[tuple[str, ...], str]] = {
    "resnet": (("fc",), "nchw"),
    "resnext": (("fc",), "nchw"),
    "wide_resnet": (("fc",), "nchw"),
    "regnet": (("fc",), "nchw"),
    "googlenet": (("fc",), "nchw"),
    "inception": (("fc",), "nchw"),
    "shufflenet": (("fc",), "nchw"),
    "mobilenet": (("classifier",), "nchw"),
    "efficientnet": (("classifier",), "nchw"),
    "mnasnet": (("classifier",), "nchw"),
    "densenet": (("classifier",), "nchw"),
    "alexnet": (("classifier",), "nchw"),  # flattened 6x6 pooled map
    "vgg": (("classifier",), "nchw"),  # flattened 7x7 pooled map
    "squeezenet": (("classifier.1", "classifier.2"), "nchw"),  # keep its global pool
    "convnext": (("classifier.2",), "nchw"),  # keep its LayerNorm and flatten
    "maxvit": (("classifier.5",), "nchw"),  # keep pool, norm, pre-logits and tanh
    "vit": (("heads",), "nchw"),  # class token
    "swin": (("head",), "nhwc"),  # stages keep channels last
}

_TORCHSCRIPT_PREPROCESS_FILE = "invariance_preprocess.json"


def _seeded(build: Callable[[], torch.nn.Module]) -> torch.nn.Module:
    """``build()`` under ``torch.manual_seed(RANDOM_INIT_SEED)`` in a forked RNG.

    Forked so the caller's random state is left as it was.
    """
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(RANDOM_INIT_SEED)
        return build()


# --------------------------------------------------------------------------- torchvision


def _family(arch: str) -> tuple[tuple[str, ...], str]:
    matches = [prefix for prefix in _FAMILIES if arch.startswith(prefix)]
    if not matches:
        raise InvarianceError(f"torchvision:{arch}: no known classifier head to remove; use a python: spec")
    return _FAMILIES[max(matches, key=len)]


def _check_arch(spec: str, arch: str) -> None:
    names = torchvision.models.list_models(module=torchvision.models)  # classification models only
    if arch not in names:
        close = difflib.get_close_matches(arch, names, n=5, cutoff=0.5)
        hint = f"did you mean {', '.join(close)}?" if close else "see torchvision.models.list_models()"
        raise InvarianceError(f"encoder spec {spec!r}: unknown torchvision architecture {arch!r}; {hint}")


def _strip_head(model: torch.nn.Module, head: tuple[str, ...]) -> torch.nn.Module:
    for path in head:
        parent_path, _, name = path.rpartition(".")
        parent = model.get_submodule(parent_path) if parent_path else model
        setattr(parent, name, torch.nn.Identity())
    return model


def _load_torchvision(spec: str, rest: str, weights) -> Encoder:
    """``torchvision:NAME`` (seeded random init), ``torchvision:NAME@WEIGHTS`` (local hub
    cache only) or ``torchvision:NAME`` with ``weights=FILE`` (a local state dict)."""
    arch, _, weights_name = rest.partition("@")
    arch = arch.strip()
    _check_arch(spec, arch)
    head, layout = _family(arch)
    if weights_name and weights is not None:
        raise InvarianceError(
            f"encoder spec {spec!r} names weights already; pass weights=None or drop the @ part (weights={weights})"
        )
    if weights_name:
        enum = _weights_enum(spec, arch, weights_name)
        model = _from_hub(spec, arch, enum)
        preprocess, sha, wname = Preprocess.from_weights(enum), _file_sha256(_hub_file(enum)), str(enum)
    else:
        model = _seeded(lambda: torchvision.models.get_model(arch, weights=None))
        preprocess, sha, wname = Preprocess(DEFAULT_RESIZE, DEFAULT_CROP), None, None
    model = _strip_head(model, head)
    if weights is not None:
        path = _existing_file(weights, "weights")
        _load_state(model, _read_state_dict(path), source=str(path), target=spec, drop=head)
        sha, wname = _file_sha256(path), str(path)
    return Encoder(
        spec=spec, module=model.eval(), preprocess=preprocess, weights_sha256=sha, arch=arch,
        device=torch.device("cpu"), weights=wname, kind="torchvision", layout=layout,
        source={"spec": spec, "weights": wname if weights is not None else None},
    )


def _weights_enum(spec: str, arch: str, name: str):
    enum_cls = torchvision.models.get_model_weights(arch)
    member = name.split(".")[-1]
    prefix = name.rpartition(".")[0]
    choices = [m.name for m in enum_cls] + ["DEFAULT"]
    if (prefix and prefix != enum_cls.__name__) or member not in choices:
        raise InvarianceError(
            f"encoder spec {spec!r}: {arch} has no weights {name!r}; use one of "
            f"{', '.join(f'@{c}' for c in choices)}"
        )
    return enum_cls[member] if member != "DEFAULT" else enum_cls.DEFAULT


def _hub_file(enum) -> Path:
    # torch.hub's own cache layout: <hub dir>/checkpoints/<file name of the url>.
    return Path(torch.hub.get_dir()) / "checkpoints" / os.path.basename(urlparse(enum.url).path)


# torch.hub names cached weights "<name>-<first hex digits of the file's SHA-256>.<ext>"
# (torch.hub.HASH_REGEX); torchvision's files all follow it.
_HASH_IN_NAME = re.compile(r"-([a-f0-9]{8,})\.")


def _from_hub(spec: str, arch: str, enum) -> torch.nn.Module:
    """The architecture built without weights, then the cached file's tensors loaded into it.

    torch.hub would unpickle the cached file without restriction and checks its hash only on
    download; here the hash prefix its name carries is checked first, then the file is read
    with ``weights_only=True``.
    """
    path = _hub_file(enum)
    if not path.is_file():
        raise InvarianceError(
            f"encoder spec {spec!r}: weights {enum} are not in the local torch hub cache ({path}) and "
            f"invariance never downloads; copy the file there, or pass a local state dict with "
            f"load_encoder('torchvision:{arch}', weights=FILE)"
        )
    _check_hash_prefix(path)
    state = _torch_load(path, "torch hub weights file", "delete the file or pass weights=FILE")
    model = _seeded(lambda: torchvision.models.get_model(arch, weights=None, **_builder_kwargs(arch, enum)))
    _load_state(model, _as_state_dict(state, path), source=str(path), target=spec)
    return model


def _check_hash_prefix(path: Path) -> None:
    match = _HASH_IN_NAME.search(path.name)
    if match is None:
        raise InvarianceError(f"{path}: its name carries no SHA-256 prefix to check it against; delete it, or "
                              "pass the file as weights=FILE if you trust it")
    digest = _file_sha256(path)
    if not digest.startswith(match.group(1)):
        raise InvarianceError(
            f"{path}: its SHA-256 starts {digest[:len(match.group(1))]}, not {match.group(1)} as its name says; the "
            "file was changed or planted: delete it and copy the published file again"
        )


def _builder_kwargs(arch: str, enum) -> dict:
    """What torchvision's builder would set from the weights' metadata: class count, input size."""
    meta = enum.meta
    kwargs = {"num_classes": len(meta["categories"])} if meta.get("categories") else {}
    if arch.startswith("vit_") and "min_size" in meta:
        kwargs["image_size"] = meta["min_size"][0]
    return kwargs


def _as_state_dict(state, path: Path) -> dict:
    if not isinstance(state, dict) or not all(isinstance(v, torch.Tensor) for v in state.values()):
        raise InvarianceError(f"{path}: not a state dict of tensors; delete it and copy the published file again")
    return state


# --------------------------------------------------------------------------- torchscript


def _load_torchscript(spec: str, rest: str, weights) -> Encoder:
    """``torchscript:FILE``, with preprocessing from an ``invariance_preprocess`` attribute
    or an ``invariance_preprocess.json`` extra file."""
    path = _existing_file(rest, spec)
    extra = {_TORCHSCRIPT_PREPROCESS_FILE: ""}
    try:
        with warnings.catch_warnings():
            # TorchScript is deprecated upstream; the user chose the form, so spare them the notice.
            warnings.simplefilter("ignore", FutureWarning)
            module = torch.jit.load(str(path), map_location="cpu", _extra_files=extra)
    except Exception as exc:  # noqa: BLE001
        raise InvarianceError(
            f"cannot load TorchScript file {path} ({_first_line(exc)}); save it with torch.jit.save"
        ) from None
    info = getattr(module, "invariance_preprocess", None)
    if info is None and extra[_TORCHSCRIPT_PREPROCESS_FILE]:
        try:
            info = json.loads(extra[_TORCHSCRIPT_PREPROCESS_FILE])
        except (ValueError, TypeError):
            raise InvarianceError(f"{path}: {_TORCHSCRIPT_PREPROCESS_FILE} is not valid JSON; fix it") from None
    return Encoder(
        spec=spec, module=module.eval(), preprocess=_module_preprocess(info, spec), weights_sha256=_file_sha256(path),
        arch=None, device=torch.device("cpu"), weights=str(path), kind="torchscript",
        source={"spec": spec, "weights": None},
    )


# --------------------------------------------------------------------------- python


def _load_python(spec: str, rest: str, weights) -> Encoder:
    """``python:MODULE:CALLABLE`` or ``python:path/to/file.py:CALLABLE``: ``CALLABLE()``
    returns the ``nn.Module``, built under the fixed seed."""
    target, sep, name = rest.rpartition(":")
    if not sep or not target or not name:
        raise InvarianceError(f"encoder spec {spec!r} must be python:MODULE:CALLABLE or python:FILE.py:CALLABLE")
    module_obj, code_file = _import_target(spec, target)
    fn = getattr(module_obj, name, None)
    if not callable(fn):
        raise InvarianceError(f"encoder spec {spec!r}: {target} has no callable {name!r}; check the name")
    try:
        model = _seeded(fn)
    except (Exception, SystemExit) as exc:  # noqa: BLE001 - the user's code may raise anything, exit too
        raise InvarianceError(f"encoder spec {spec!r}: {name}() raised {_described(exc)}") from None
    if not isinstance(model, torch.nn.Module):
        raise InvarianceError(
            f"encoder spec {spec!r}: {name}() returned a {type(model).__name__}, not a torch.nn.Module; "
            "return the model"
        )
    preprocess = _module_preprocess(getattr(model, "invariance_preprocess", None), spec)
    return Encoder(
        spec=spec, module=model.eval(), preprocess=preprocess, weights_sha256=None, arch=None,
        device=torch.device("cpu"), kind="python", source={"spec": spec, "weights": None},
        code_sha256=_file_sha256(code_file) if code_file else None,
    )


def _import_target(spec: str, target: str):
    """The user's module and the file it came from (``None`` when it has none)."""
    if target.endswith(".py") or os.sep in target or "/" in target:
        return _import_file(spec, target)
    try:
        # As `python -m` does: a module of the folder the user works in is found without
        # PYTHONPATH. Only for this import, so the library never sees the folder otherwise.
        with _on_import_path(Path.cwd()):
            module = importlib.import_module(target)
    except (Exception, SystemExit) as exc:  # noqa: BLE001 - the user's code may raise anything, exit too
        raise InvarianceError(
            f"cannot import module {target!r} for {spec} ({_described(exc)}); "
            "run from the folder that holds it, install it, add its folder to PYTHONPATH or give a file path"
        ) from None
    code = getattr(module, "__file__", None)
    return module, Path(code) if code else None


def _import_file(spec: str, target: str):
    path = _existing_file(target, spec).resolve()
    mod_name = "invariance_user_" + hashlib.sha256(str(path).encode()).hexdigest()[:16]
    loader_spec = importlib.util.spec_from_file_location(mod_name, path)
    module = importlib.util.module_from_spec(loader_spec)
    # Registered while it runs, as the import system does (dataclasses and pickling look the
    # module up by name); its folder is importable, as for `python path/to/file.py`.
    sys.modules[mod_name] = module
    try:
        with _on_import_path(path.parent):
            loader_spec.loader.exec_module(module)
    except (Exception, SystemExit) as exc:  # noqa: BLE001 - the user's code may raise anything, exit too
        sys.modules.pop(mod_name, None)
        raise InvarianceError(
            f"cannot import {path} for {spec} ({_described(exc)}); fix the file"
        ) from None
    return module, path


@contextlib.contextmanager
def _on_import_path(folder: Path):
    """``folder`` first on ``sys.path`` inside the block, unless it is there already."""
    entry = str(folder)
    added = entry not in sys.path
    if added:
        sys.path.insert(0, entry)
        importlib.invalidate_caches()  # the folder may have gained files since it was last searched
    try:
        yield
    finally:
        if added:
            with contextlib.suppress(ValueError):
                sys.path.remove(entry)


# The forms that build a module themselves; a checkpoint names one of them as its source.
_MODULE_LOADERS: dict[str, Callable[..., Encoder]] = {
    "torchvision": _load_torchvision,
    "torchscript": _load_torchscript,
    "python": _load_python,
}
