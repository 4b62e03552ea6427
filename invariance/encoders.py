"""Encoder specs, loading, layer taps, batched feature extraction and checkpoints.

An encoder is named by a *spec* string (DESIGN.md, "Encoder SPEC forms"):

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
    a function called with no arguments that returns an ``nn.Module``.
``checkpoint:FILE``
    a file written by :func:`save_checkpoint` (for example by ``invariance align``).

The default feature is the globally pooled feature before the classifier head (layer key
``"output"``); any torch.fx graph node can be tapped as well (:func:`available_layers`).
"""

from __future__ import annotations

import difflib
import hashlib
import importlib
import importlib.util
import io
import json
import os
import sys
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable
from urllib.parse import urlparse

import numpy as np
import torch
import torchvision
from PIL import Image
from torchvision.transforms import InterpolationMode
from torchvision.transforms import functional as TF

from invariance import feature_cache
from invariance._io import atomic_write_bytes
from invariance.data import load_rgb
from invariance.errors import InvalidParameter, InvarianceError
from invariance.options import ExtractionOptions
from invariance.progress import as_reporter

# ImageNet channel statistics and the 256 -> 224 resize/crop: common practice, and what
# torchvision's ImageNet weights use (their ``transforms()`` metadata).
IMAGENET_MEAN = (0.485, 0.456, 0.406)
IMAGENET_STD = (0.229, 0.224, 0.225)
DEFAULT_RESIZE = 256
DEFAULT_CROP = 224

RANDOM_INIT_SEED = 0
CHECKPOINT_FORMAT = "invariance.checkpoint/1"
OUTPUT_KEY = "output"

# Image-decoding worker processes when the caller does not say. Measured with
# tests/benchmarks/bench_extract.py on the shared 2-core development machine (resnet18,
# 224 px, batch 32): decoding and preprocessing cost 7.8% of the forward pass, so that is
# all a worker can hide; one worker beat the main process in both runs (0.89x vs 1.05x of
# the bare forward pass at 50 pairs, 0.70x vs 0.90x at 200 pairs, load average 5-11) and a
# second worker added nothing (0.89x). A single batch has nothing to overlap, so it is
# decoded in the main process (no worker start-up).
DEFAULT_NUM_WORKERS = 1

# Per torchvision family: the attribute(s) replaced by Identity so the model returns the
# pooled feature before the head, and the layout of 4-D activations of its graph nodes.
# Longest matching name prefix wins.
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

_INTERPOLATIONS = ("nearest", "bilinear", "bicubic")
_PREPROCESS_KEYS = {"image_size", "resize", "crop", "mean", "std", "interpolation"}
_TORCHSCRIPT_PREPROCESS_FILE = "invariance_preprocess.json"


# --------------------------------------------------------------------------- preprocess


@dataclass
class Preprocess:
    """Resize the shorter side, centre-crop a square, convert to a tensor and normalise.

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
        return {
            "resize": self.resize,
            "crop": self.crop,
            "mean": list(self.mean),
            "std": list(self.std),
            "interpolation": self.interpolation,
        }

    @classmethod
    def from_weights(cls, weights) -> "Preprocess":
        """Preprocessing from a torchvision weights enum's own ``transforms()`` metadata."""
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
        """From ``{"image_size"|"resize"/"crop", "mean", "std", "interpolation"}``; missing keys
        fall back to the ImageNet defaults."""
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


# --------------------------------------------------------------------------- encoder


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

    def __call__(self, x: torch.Tensor) -> torch.Tensor:
        """Pooled (N, D) features of a preprocessed batch on ``device``."""
        return _pool(self.module(x), self.layout, OUTPUT_KEY, self.spec)

    def describe(self) -> dict:
        """JSON-able description for the result file."""
        return {
            "spec": self.spec,
            "arch": self.arch,
            "weights": self.weights,
            "weights_sha256": self.weights_sha256,
            "preprocess": self.preprocess.describe(),
            "device": str(self.device),
        }


def resolve_device(device: str = "auto") -> torch.device:
    """``"auto"`` (CUDA when available, else CPU), ``"cpu"``, ``"cuda"`` or ``"cuda:N"``."""
    if not isinstance(device, str):
        raise InvarianceError(f"device must be auto, cpu or cuda, got {device!r}")
    name = device.strip().lower()
    if name == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
    if name == "cpu":
        return torch.device("cpu")
    if name == "cuda" or name.startswith("cuda:"):
        if not torch.cuda.is_available():
            raise InvarianceError(f"--device {device}: no CUDA device is available here; use --device cpu or auto")
        try:
            dev = torch.device(name)
        except RuntimeError:
            raise InvarianceError(f"--device {device} is not a valid device; use cuda or cuda:N") from None
        if dev.index is not None and dev.index >= torch.cuda.device_count():
            raise InvarianceError(
                f"--device {device}: only {torch.cuda.device_count()} CUDA device(s) here; use cuda:0"
            )
        return dev
    raise InvarianceError(f"--device {device!r} is not one of auto, cpu, cuda")


def load_encoder(
    spec: str,
    *,
    weights: str | os.PathLike | None = None,
    device: str = "auto",
    image_size: int | None = None,
) -> Encoder:
    """Load the encoder named by ``spec`` in eval mode on ``device``.

    Parameters
    ----------
    spec : str
        One of the spec forms of this module's docstring.
    weights : path, optional
        A local state dict for a ``torchvision:NAME`` spec (``--weights FILE``).
    device : {"auto", "cpu", "cuda"}
    image_size : int, optional
        Resize the shorter side to ``image_size`` and centre-crop an ``image_size`` square
        (no crop margin on square images); overrides the weights' own preprocessing.

    Returns
    -------
    Encoder

    Raises
    ------
    InvarianceError
        Unknown form or architecture (with close names), missing file, weights that do not
        fit the architecture, missing hub weights, or a ``python:`` callable that fails.
    """
    if not isinstance(spec, str) or ":" not in spec:
        raise InvarianceError(f"encoder spec {spec!r} must look like {_FORMS_HINT}")
    if image_size is not None:
        if isinstance(image_size, bool) or not isinstance(image_size, (int, np.integer)) or image_size < 1:
            raise InvarianceError(f"--image-size must be a positive integer number of pixels, got {image_size!r}")
    kind, rest = spec.split(":", 1)
    loader = _LOADERS.get(kind)
    if loader is None:
        raise InvarianceError(f"encoder spec {spec!r}: unknown form {kind!r}; use {_FORMS_HINT}")
    if weights is not None and kind != "torchvision":
        raise InvarianceError(f"--weights {weights} only applies to torchvision:NAME specs, not {spec}")
    dev = resolve_device(device)
    enc = loader(spec, rest, weights)
    if image_size is not None:
        enc.preprocess = Preprocess(int(image_size), int(image_size), enc.preprocess.mean, enc.preprocess.std,
                                    enc.preprocess.interpolation)
    _check_input_size(enc)
    enc.module = enc.module.to(dev).eval()
    enc.device = dev
    return enc


_FORMS_HINT = (
    "torchvision:NAME, torchvision:NAME@WEIGHTS, torchscript:FILE, python:MODULE:CALLABLE "
    "or checkpoint:FILE"
)


# --------------------------------------------------------------------------- torchvision


def _family(arch: str) -> tuple[tuple[str, ...], str]:
    matches = [prefix for prefix in _FAMILIES if arch.startswith(prefix)]
    if not matches:
        raise InvarianceError(f"torchvision:{arch}: no known classifier head to remove; use a python: spec")
    return _FAMILIES[max(matches, key=len)]


def _classification_models() -> list[str]:
    return torchvision.models.list_models(module=torchvision.models)


def _check_arch(spec: str, arch: str) -> None:
    names = _classification_models()
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


def _random_init(arch: str) -> torch.nn.Module:
    # Forked so the caller's random state is left as it was.
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(RANDOM_INIT_SEED)
        return torchvision.models.get_model(arch, weights=None)


def _load_torchvision(spec: str, rest: str, weights) -> Encoder:
    arch, _, weights_name = rest.partition("@")
    arch = arch.strip()
    _check_arch(spec, arch)
    head, layout = _family(arch)
    if weights_name and weights is not None:
        raise InvarianceError(f"encoder spec {spec!r} names weights already; drop --weights {weights} or the @ part")
    if weights_name:
        enum = _weights_enum(spec, arch, weights_name)
        model = _from_hub(spec, arch, enum)
        preprocess, sha, wname = Preprocess.from_weights(enum), _file_sha256(_hub_file(enum)), str(enum)
    else:
        model, preprocess, sha, wname = _random_init(arch), Preprocess(DEFAULT_RESIZE, DEFAULT_CROP), None, None
    model = _strip_head(model, head)
    if weights is not None:
        path = _existing_file(weights, "--weights")
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


def _from_hub(spec: str, arch: str, enum) -> torch.nn.Module:
    path = _hub_file(enum)
    if not path.is_file():
        raise InvarianceError(
            f"encoder spec {spec!r}: weights {enum} are not in the local torch hub cache ({path}) and "
            f"invariance never downloads; copy the file there, or pass a local state dict with "
            f"--encoder torchvision:{arch} --weights FILE"
        )
    # The file is cached, so torchvision's builder reads it without any network access and
    # applies its own per-weights settings (e.g. image size, input transform).
    try:
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(RANDOM_INIT_SEED)
            return torchvision.models.get_model(arch, weights=enum, progress=False)
    except Exception as exc:  # noqa: BLE001 - any read failure is a bad cache file
        raise InvarianceError(
            f"cannot load {path} for {spec} ({_first_line(exc)}); delete the file or pass --weights FILE"
        ) from None


# --------------------------------------------------------------------------- state dicts


def _read_state_dict(path: Path) -> dict:
    try:
        obj = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # noqa: BLE001 - pickle, zip and torch errors alike
        raise InvarianceError(
            f"cannot read weights file {path} ({_first_line(exc)}); pass a torch.save'd state_dict"
        ) from None
    # Training scripts often wrap the weights (common practice): {"state_dict": ...}/{"model": ...}.
    for wrapper in ("state_dict", "model"):
        if isinstance(obj, dict) and isinstance(obj.get(wrapper), dict):
            obj = obj[wrapper]
    if not isinstance(obj, dict) or not all(isinstance(v, torch.Tensor) for v in obj.values()):
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
    module.load_state_dict(state, strict=True)


# --------------------------------------------------------------------------- other forms


def _load_torchscript(spec: str, rest: str, weights) -> Encoder:
    path = _existing_file(rest, spec)
    extra = {_TORCHSCRIPT_PREPROCESS_FILE: ""}
    try:
        with warnings.catch_warnings():
            # TorchScript is deprecated upstream; the user chose the form, so spare them the notice.
            warnings.simplefilter("ignore", FutureWarning)
            module = torch.jit.load(str(path), map_location="cpu", _extra_files=extra)
    except Exception as exc:  # noqa: BLE001
        raise InvarianceError(f"cannot load TorchScript file {path} ({_first_line(exc)}); save it with torch.jit.save") from None
    info = getattr(module, "invariance_preprocess", None)
    if info is None and extra[_TORCHSCRIPT_PREPROCESS_FILE]:
        try:
            info = json.loads(extra[_TORCHSCRIPT_PREPROCESS_FILE])
        except (ValueError, TypeError):
            raise InvarianceError(f"{path}: {_TORCHSCRIPT_PREPROCESS_FILE} is not valid JSON; fix it") from None
    sha = _file_sha256(path)
    return Encoder(
        spec=spec, module=module.eval(), preprocess=_module_preprocess(info, spec), weights_sha256=sha,
        arch=None, device=torch.device("cpu"), weights=str(path), kind="torchscript",
        source={"spec": spec, "weights": None},
    )


def _load_python(spec: str, rest: str, weights) -> Encoder:
    target, sep, name = rest.rpartition(":")
    if not sep or not target or not name:
        raise InvarianceError(f"encoder spec {spec!r} must be python:MODULE:CALLABLE or python:FILE.py:CALLABLE")
    module_obj, code_file = _import_target(spec, target)
    fn = getattr(module_obj, name, None)
    if not callable(fn):
        raise InvarianceError(f"encoder spec {spec!r}: {target} has no callable {name!r}; check the name")
    try:
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(RANDOM_INIT_SEED)
            model = fn()
    except Exception as exc:  # noqa: BLE001 - the user's code may raise anything
        raise InvarianceError(f"encoder spec {spec!r}: {name}() raised {type(exc).__name__}: {_first_line(exc)}") from None
    if not isinstance(model, torch.nn.Module):
        raise InvarianceError(
            f"encoder spec {spec!r}: {name}() returned a {type(model).__name__}, not a torch.nn.Module; "
            "return the model"
        )
    return Encoder(
        spec=spec, module=model.eval(), preprocess=_module_preprocess(getattr(model, "invariance_preprocess", None), spec),
        weights_sha256=None, arch=None, device=torch.device("cpu"), kind="python",
        source={"spec": spec, "weights": None}, code_sha256=_file_sha256(code_file) if code_file else None,
    )


def _import_target(spec: str, target: str):
    if target.endswith(".py") or os.sep in target or "/" in target:
        path = _existing_file(target, spec)
        mod_name = "invariance_user_" + hashlib.sha256(str(path.resolve()).encode()).hexdigest()[:16]
        try:
            loader_spec = importlib.util.spec_from_file_location(mod_name, path)
            module = importlib.util.module_from_spec(loader_spec)
            loader_spec.loader.exec_module(module)
        except Exception as exc:  # noqa: BLE001
            raise InvarianceError(f"cannot import {path} for {spec} ({type(exc).__name__}: {_first_line(exc)}); fix the file") from None
        return module, path
    try:
        module = importlib.import_module(target)
    except Exception as exc:  # noqa: BLE001
        raise InvarianceError(
            f"cannot import module {target!r} for {spec} ({type(exc).__name__}: {_first_line(exc)}); "
            "install it, add its folder to PYTHONPATH or give a file path"
        ) from None
    code = getattr(module, "__file__", None)
    return module, Path(code) if code else None


def _module_preprocess(info, spec: str) -> Preprocess:
    if info is None:
        return Preprocess(DEFAULT_RESIZE, DEFAULT_CROP)
    return Preprocess.from_dict(dict(info) if hasattr(info, "items") else info, source=spec)


def _load_checkpoint(spec: str, rest: str, weights) -> Encoder:
    path = _existing_file(rest, spec)
    try:
        ckpt = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # noqa: BLE001
        raise InvarianceError(f"cannot read checkpoint {path} ({_first_line(exc)}); write it with invariance align") from None
    if not isinstance(ckpt, dict) or ckpt.get("format") != CHECKPOINT_FORMAT:
        raise InvarianceError(f"{path} is not an invariance checkpoint ({CHECKPOINT_FORMAT}); write it with invariance align")
    base = _rebuild_source(path, ckpt)
    if base.arch != ckpt.get("arch"):
        raise InvarianceError(
            f"checkpoint {path} was saved from architecture {ckpt.get('arch')!r} but its source "
            f"{ckpt['source_spec']} now builds {base.arch!r}; restore the source encoder"
        )
    _load_state(base.module, ckpt["state_dict"], source=str(path), target=ckpt["source_spec"])
    return Encoder(
        spec=spec, module=base.module.eval(), preprocess=Preprocess(**ckpt["preprocess"]),
        weights_sha256=_file_sha256(path), arch=base.arch, device=torch.device("cpu"), weights=str(path),
        kind="checkpoint", layout=base.layout, source=dict(base.source), code_sha256=base.code_sha256,
    )


def _rebuild_source(path: Path, ckpt: dict) -> Encoder:
    source = ckpt.get("source_spec")
    if not isinstance(source, str) or source.split(":", 1)[0] not in ("torchvision", "torchscript", "python"):
        raise InvarianceError(f"checkpoint {path} names no usable source encoder ({source!r}); write it with invariance align")
    # The checkpoint holds every weight, so a torchvision source needs only its architecture,
    # not the weights file it was first loaded from.
    kind, rest = source.split(":", 1)
    enc = _LOADERS[kind](source, rest, None)
    enc.source = {"spec": source, "weights": ckpt.get("source_weights")}
    return enc


_LOADERS: dict[str, Callable] = {
    "torchvision": _load_torchvision,
    "torchscript": _load_torchscript,
    "python": _load_python,
    "checkpoint": _load_checkpoint,
}


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


# --------------------------------------------------------------------------- helpers


def _existing_file(value, what: str) -> Path:
    path = Path(value).expanduser()
    if not path.is_file():
        raise InvarianceError(f"{what}: file not found: {path}; check the path")
    return path


def _file_sha256(path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


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


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


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
            f"drop --image-size or pass --image-size {fixed}"
        )
    smallest = _min_input_size(enc.arch)
    if smallest and crop < smallest:
        raise InvarianceError(
            f"encoder {enc.spec} needs inputs of at least {smallest} px (torchvision's weights metadata) "
            f"but preprocessing gives {crop} px; pass --image-size {smallest} or larger"
        )


# --------------------------------------------------------------------------- layer taps


def available_layers(encoder: Encoder) -> list[str]:
    """Names that ``extract_features(layers=...)`` can tap, in forward order.

    ``"output"`` (the pooled feature before the head) comes first, then the eval-mode
    torch.fx node names of ``torchvision.models.feature_extraction.get_graph_node_names``
    together with the submodules that contain them (``layer3`` taps the last node of
    ``layer3``, as ``create_feature_extractor`` defines it).
    """
    return _tappable(_graph_nodes(encoder))


def _tappable(nodes: list[str]) -> list[str]:
    names: dict[str, None] = {}
    for node in nodes:
        parts = node.split(".")
        for depth in range(1, len(parts)):
            names.setdefault(".".join(parts[:depth]), None)
        names.setdefault(node, None)
    names.pop(OUTPUT_KEY, None)
    return [OUTPUT_KEY] + list(names)


def _graph_nodes(encoder: Encoder) -> list[str]:
    from torchvision.models.feature_extraction import get_graph_node_names

    if isinstance(encoder.module, torch.jit.ScriptModule):
        raise InvarianceError(
            f"encoder {encoder.spec}: TorchScript modules cannot be tapped by layer; make the layer "
            "the module's output or load the model with a python: spec"
        )
    try:
        _, nodes = get_graph_node_names(encoder.module, suppress_diff_warning=True)
    except Exception as exc:  # noqa: BLE001 - torch.fx fails in many ways on dynamic code
        raise InvarianceError(
            f"encoder {encoder.spec} cannot be traced by torch.fx ({type(exc).__name__}: {_first_line(exc)}); "
            "use the default output layer only"
        ) from None
    finally:
        encoder.module.eval()
    return nodes


def _validate_layers(encoder: Encoder, layers) -> tuple[list[str], list[str] | None]:
    """The requested layers (order kept, repeats dropped) and the graph nodes, when traced."""
    if layers is None:
        return [OUTPUT_KEY], None
    if isinstance(layers, str) or not all(isinstance(n, str) for n in layers) or not layers:
        raise InvarianceError(f"layers must be a non-empty list of node names, got {layers!r}")
    wanted = list(dict.fromkeys(layers))
    if wanted == [OUTPUT_KEY]:
        return wanted, None
    nodes = _graph_nodes(encoder)
    valid = _tappable(nodes)
    for name in wanted:
        if name not in valid:
            close = difflib.get_close_matches(name, valid, n=5, cutoff=0.4)
            hint = f"nearest: {', '.join(close)}" if close else "list them with `invariance layers --encoder SPEC`"
            raise InvarianceError(f"encoder {encoder.spec} has no layer {name!r}; {hint}")
    return wanted, nodes


def _runner(encoder: Encoder, layers: list[str], nodes: list[str] | None) -> Callable[[torch.Tensor], dict]:
    """A function from a batch to ``{layer: raw activation}``, all layers in one forward pass."""
    if layers == [OUTPUT_KEY]:
        return lambda x: {OUTPUT_KEY: encoder.module(x)}
    from torchvision.models.feature_extraction import create_feature_extractor

    nodes = nodes if nodes is not None else _graph_nodes(encoder)
    # The eval graph's last node is the module's return value (the pooled feature).
    node_of = {name: (nodes[-1] if name == OUTPUT_KEY else name) for name in layers}
    extractor = create_feature_extractor(
        encoder.module, return_nodes={n: n for n in dict.fromkeys(node_of.values())}, suppress_diff_warning=True
    ).eval()

    def run(x):
        out = extractor(x)
        return {name: out[node] for name, node in node_of.items()}

    return run


def _pool(out, layout: str, layer: str, spec: str, names=None) -> torch.Tensor:
    """(N, D) from a layer's activation: spatial maps averaged, token maps' class token."""
    if not isinstance(out, torch.Tensor):
        raise InvarianceError(
            f"encoder {spec} layer {layer!r} returned a {type(out).__name__}, not a tensor"
            f"{_on_images(names)}; make the module return one tensor"
        )
    if out.dim() == 2:
        return out
    if out.dim() == 4:
        return out.mean(dim=(1, 2) if layout == "nhwc" else (2, 3))
    if out.dim() == 3:
        return out[:, 0]  # (N, tokens, C): the class token comes first (ViT convention)
    raise InvarianceError(
        f"encoder {spec} layer {layer!r} gave a {out.dim()}-D tensor {tuple(out.shape)}{_on_images(names)}; "
        "expected (N, D), (N, T, C) or (N, C, H, W)"
    )


def _on_images(names) -> str:
    if not names:
        return ""
    shown = ", ".join(names[:4]) + (f" and {len(names) - 4} more" if len(names) > 4 else "")
    return f" for images {shown}"


# --------------------------------------------------------------------------- extraction


class _PairImages(torch.utils.data.Dataset):
    """Pair ``i`` as a (2, 3, H, W) tensor: clean first, cluttered second."""

    def __init__(self, pairs, preprocess: Preprocess):
        self.clean = list(pairs.clean)
        self.cluttered = list(pairs.cluttered)
        self.preprocess = preprocess

    def __len__(self):
        return len(self.clean)

    def __getitem__(self, i):
        try:
            return i, torch.stack([self.preprocess(load_rgb(self.clean[i])), self.preprocess(load_rgb(self.cluttered[i]))])
        except InvarianceError as exc:
            return i, str(exc)  # re-raised in the main process with its one-line message


def _collate(items):
    """Interleave pairs: rows 2k and 2k+1 of the batch are pair k's clean and cluttered views."""
    for _, value in items:
        if isinstance(value, str):
            return None, value
    return [i for i, _ in items], torch.cat([value for _, value in items])


def _worker_init(_):
    torch.set_num_threads(1)  # the main process owns the cores for the forward pass


def extract_features(
    pairs,
    encoder: Encoder,
    layers=None,
    *,
    options: ExtractionOptions | None = None,
    progress=True,
    num_workers: int | None = None,
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Features of every clean and cluttered image, paired row by row.

    Parameters
    ----------
    pairs : invariance.data.PairSet
    encoder : Encoder
    layers : list of str, optional
        Graph nodes to tap (see :func:`available_layers`); default ``["output"]``, the
        pooled feature before the head. All layers come from one forward pass. Spatial
        maps are globally average-pooled; token maps (N, T, C) give their class token.
    options : ExtractionOptions, optional
        ``batch_size``: images per forward pass (both views of ``batch_size // 2`` pairs,
        interleaved, so stopping early never leaves one domain over-represented);
        ``cache_dir``: feature cache folder, ``None`` disables caching (entries are
        written only after the whole extraction succeeded). Device and image size are
        the encoder's, set when it was loaded.
    progress : bool, callable or Reporter
        Progress bar on stderr (see :mod:`invariance.progress`).
    num_workers : int, optional
        Image-decoding worker processes; ``None`` uses ``DEFAULT_NUM_WORKERS`` (measured
        in tests/benchmarks/bench_extract.py) when there is more than one batch, else 0.

    Returns
    -------
    dict
        ``{layer: (clean, cluttered)}``, float32 arrays of shape (len(pairs), D) in the
        order of ``pairs``.
    """
    if not isinstance(encoder, Encoder):
        raise InvarianceError(f"extract_features needs an Encoder from load_encoder, got {type(encoder).__name__}")
    if len(pairs) == 0:
        raise InvarianceError("no image pairs to extract features from; check the data folder")
    options = options or ExtractionOptions()
    if not isinstance(options, ExtractionOptions):
        raise InvalidParameter("options", f"options={options!r} is not valid; pass an ExtractionOptions")
    batch_size, cache_dir = options.batch_size, options.cache_dir
    if num_workers is not None and (not isinstance(num_workers, (int, np.integer)) or num_workers < 0):
        raise InvarianceError(f"num_workers must be an integer >= 0, got {num_workers!r}")
    wanted, nodes = _validate_layers(encoder, layers)
    keys = _cache_keys(pairs, encoder, wanted) if cache_dir is not None else {}
    found = {}
    for layer, key in keys.items():
        hit = feature_cache.load(cache_dir, key, rows=len(pairs), content_hash=pairs.content_hash())
        if hit is not None:
            found[layer] = hit
    missing = [layer for layer in wanted if layer not in found]
    if missing:
        workers = _default_workers(len(pairs), int(batch_size) // 2) if num_workers is None else int(num_workers)
        fresh = _extract(pairs, encoder, _runner(encoder, missing, nodes), missing, int(batch_size) // 2, progress, workers)
        for layer in missing:  # only after the whole extraction succeeded
            if cache_dir is not None:
                feature_cache.store(cache_dir, keys[layer], *fresh[layer], _cache_header(pairs, encoder, layer))
        found.update(fresh)
    return {layer: found[layer] for layer in wanted}


def _default_workers(n_pairs: int, pairs_per_batch: int) -> int:
    return DEFAULT_NUM_WORKERS if n_pairs > pairs_per_batch else 0


def _cache_keys(pairs, encoder: Encoder, layers: list[str]) -> dict[str, str]:
    # The module state is hashed on every call: a module trained in place (alignment) must
    # never be served the features of its earlier weights.
    base = {
        "spec": encoder.spec,
        "weights_sha256": encoder.weights_sha256,
        "state_sha256": _state_sha256(encoder.module),
        "code_sha256": encoder.code_sha256,
        "preprocess": encoder.preprocess.describe(),
        "content_hash": pairs.content_hash(),
        "format": feature_cache.FORMAT,
    }
    return {layer: feature_cache.cache_key({**base, "layer": layer}) for layer in layers}


def _cache_header(pairs, encoder: Encoder, layer: str) -> dict:
    return {"spec": encoder.spec, "layer": layer, "content_hash": pairs.content_hash(), "pairs": len(pairs)}


def _extract(pairs, encoder: Encoder, run, layers: list[str], pairs_per_batch: int, progress: bool, workers: int):
    loader = torch.utils.data.DataLoader(
        _PairImages(pairs, encoder.preprocess), batch_size=pairs_per_batch, shuffle=False,
        num_workers=workers, collate_fn=_collate, worker_init_fn=_worker_init if workers else None,
        generator=torch.Generator(),  # DataLoader draws a seed; keep the caller's RNG untouched
    )
    out: dict[str, np.ndarray] = {}
    with as_reporter(progress).bar(len(pairs), f"features {encoder.spec}") as bar, torch.inference_mode():
        for indices, batch in loader:
            if indices is None:
                raise InvarianceError(batch)
            names = _batch_names(pairs, indices)
            feats = _forward(run, encoder, batch.to(encoder.device), layers, names)
            for layer, value in feats.items():
                if layer not in out:
                    out[layer] = np.empty((2, len(pairs), value.shape[1]), dtype=np.float32)
                out[layer][0, indices] = value[0::2]
                out[layer][1, indices] = value[1::2]
            bar.update(len(indices))
    return {layer: (arr[0], arr[1]) for layer, arr in out.items()}


def _batch_names(pairs, indices) -> list[str]:
    return [f"{view}/{pairs.names[i]}" for i in indices for view in ("clean", "cluttered")]


def _forward(run, encoder: Encoder, batch: torch.Tensor, layers: list[str], names: list[str]) -> dict:
    try:
        raw = run(batch)
    except InvarianceError:
        raise
    except (RuntimeError, ValueError, AssertionError, IndexError) as exc:
        size = batch.shape[-1]
        raise InvarianceError(
            f"encoder {encoder.spec} failed on {size} px inputs{_on_images(names)} ({_first_line(exc)}); "
            f"if the images are too small for this network pass a larger --image-size (e.g. 224)"
        ) from None
    feats = {}
    for layer in layers:
        value = _pool(raw[layer], encoder.layout, layer, encoder.spec, names).float()
        finite = torch.isfinite(value).all(dim=1)
        if not bool(finite.all()):
            bad = [names[r] for r in torch.nonzero(~finite).flatten().tolist()]
            raise InvarianceError(
                f"encoder {encoder.spec} layer {layer!r} gave NaN or infinite features{_on_images(bad)}; "
                "check the model's weights and its input normalisation"
            )
        feats[layer] = value.cpu().numpy()
    return feats
