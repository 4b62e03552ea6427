"""Trunk and tail: the frozen stages run once, the trained stages run every step.

Only the stages from ``train_from`` onwards are trained. The frozen stages before it run
once over every alignment image and their activations are cached, so a training step
costs only the trained tail and the discriminator.
"""

from __future__ import annotations

import torch
from torch import nn

from ..errors import InvalidParameter, InvarianceError

# Largest relative difference allowed between ``tail(trunk(x))`` and ``module(x)``: room for
# float32 re-association of the same operations (another kernel choice); on the CPU the zoo
# CNN and torchvision ResNet-18 reproduce exactly at every stage (measured).
_SPLIT_RTOL = 1e-4
# Images the split is checked on: enough for batch-shaped code paths, cheap (common practice).
SPLIT_CHECK_IMAGES = 4
# Forward floating-point operations per image (as torch.utils.flop_counter counts them)
# that the default trainable tail may cost: the earliest stage whose tail fits trains. The
# budget is what fits the 3-minute target with the default 800 steps on a 2-core machine:
# ResNet-18 at 64 px trained from layer4 (67 M) in 151-155 s there, so 180 / 155 x 67 M =
# 78 M, rounded down; from layer3 (134 M) or whole (296 M) it would not fit. The panel's
# small CNNs and ViT (6-25 M) train whole: that closed more of their held-out gap than
# their last stages did (workbench CNN 52% against 44% with the default objective; digits
# 38% against 14% with teacher; docs/alignment.md).
TAIL_FLOP_BUDGET = 75e6
# Activations per tail forward when computing features without gradients; bounds memory
# on large alignment sets (common practice).
_FEATURE_CHUNK = 256


def _first_leaf(module: nn.Module) -> nn.Module:
    return next((m for m in module.modules() if not list(m.children())), module)


class _Chain(nn.Module):
    """Runs stages in order, flattening before a linear stage as torchvision's forward does."""

    def __init__(self, stages: list[nn.Module], flatten_end: bool):
        super().__init__()
        self.stages = nn.ModuleList(stages)  # the encoder's own modules, shared not copied
        self.flatten_end = flatten_end

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        for stage in self.stages:
            if x.ndim > 2 and isinstance(_first_leaf(stage), nn.Linear):
                x = torch.flatten(x, 1)
            x = stage(x)
        if self.flatten_end and x.ndim > 2:
            x = torch.flatten(x, 1)
        return x


def _children_listing(module: nn.Module) -> str:
    return ", ".join(name for name, _ in module.named_children()) or "(none)"


def _count(params) -> int:
    return sum(p.numel() for p in params)


def _tail_flops(trunk: nn.Module, tail: nn.Module, example: torch.Tensor) -> float:
    """Forward floating-point operations per image of ``tail`` on ``trunk(example)``."""
    from torch.utils.flop_counter import FlopCounterMode

    with torch.no_grad():
        activation = trunk(example[:1])
        with FlopCounterMode(display=False) as counter:
            tail(activation)
    return float(counter.get_total_flops())


def _within_budget(candidates, example: torch.Tensor):
    """The first ``(trunk, tail, node)`` of ``candidates`` whose tail fits :data:`TAIL_FLOP_BUDGET`,
    else the last (the smallest tail)."""
    last = None
    for trunk, tail, node in candidates:
        last = (trunk, tail, node)
        if _tail_flops(trunk, tail, example) <= TAIL_FLOP_BUDGET:
            return last
    return last


def _chain_candidates(module: nn.Module):
    for name, child in module.named_children():
        if _count(child.parameters()):
            yield (*_chain_split(module, name), name)


def split_module(module: nn.Module, train_from: str | None, example: torch.Tensor) -> tuple[nn.Module, nn.Module, str]:
    """Split ``module`` into a frozen trunk and a trainable tail.

    The default tail is the longest one whose forward costs at most
    :data:`TAIL_FLOP_BUDGET` floating-point operations per image on ``example``: the
    tail starts at the earliest top-level stage with parameters that fits when the
    forward is the plain sequence of its children (the panel's small CNNs: the whole
    network; ResNet-18 at 64 px: ``layer4``), otherwise at the earliest node of the
    forward's ``torch.fx`` graph that fits, where one activation carries everything the
    rest needs, as torchvision's feature extraction does (a small ViT: the whole
    forward, from its patch projection; see :mod:`invariance.align.graph_split`). When
    no tail fits, the smallest one trains. The budget scales with the image size, so
    larger images train fewer stages.

    The split is checked on ``example``: ``tail(trunk(x))`` must equal ``module(x)``.

    Parameters
    ----------
    module : nn.Module
        The encoder's module; it must return a pooled (N, D) feature matrix.
    train_from : str or None
        Top-level child, or dotted submodule path (``encoder.layers.encoder_layer_2``),
        where the tail starts; ``None``: the rule above.
    example : torch.Tensor
        A few preprocessed images to check the split on.

    Returns
    -------
    trunk, tail : nn.Module
        Share the parameters of ``module`` (training the tail trains ``module``).
    node : str
        The stage the tail starts at.

    Raises
    ------
    InvarianceError
        When ``train_from`` names no stage, has no trainable stage from there on, or the
        encoder cannot be split there (the message says why and what to pass).

    References
    ----------
    Reed, J. K. et al. (2022). torch.fx: practical program capture and transformation for
    deep learning in Python. MLSys 2022.
    """
    from . import graph_split

    names = [name for name, _ in module.named_children()]
    if train_from is None:
        if not any(_count(child.parameters()) for _, child in module.named_children()):
            raise InvarianceError("the encoder has no top-level stage with parameters; nothing can be aligned")
        whole = next(_chain_candidates(module))
        if _reproduces(module, *whole[:2], example):  # the forward is the chain of its children
            return _within_budget(_chain_candidates(module), example)
        return graph_split.split_graph(module, None, example)
    if train_from in names:
        chain = _chain_split(module, train_from)
        if _reproduces(module, *chain, example):
            return (*chain, train_from)
    if train_from not in names and "." not in train_from and not _is_submodule(module, train_from):
        raise InvalidParameter("train_from", f"train_from={train_from!r} is not valid: not a stage of this "
                                             f"encoder; pass one of: {_children_listing(module)}")
    return graph_split.split_graph(module, train_from, example)


def _is_submodule(module: nn.Module, path: str) -> bool:
    return any(name == path for name, _ in module.named_modules())


def _chain_split(module: nn.Module, node: str) -> tuple[nn.Module, nn.Module]:
    children = list(module.named_children())
    cut = [name for name, _ in children].index(node)
    trunk = _Chain([m for _, m in children[:cut]], flatten_end=False)
    tail = _Chain([m for _, m in children[cut:]], flatten_end=True)
    if not any(True for _ in tail.parameters()):
        raise InvalidParameter("train_from", f"train_from={node!r} is not valid: no trainable parameters from there "
                                             f"on; pass an earlier stage of: {_children_listing(module)}")
    return trunk, tail


def _reproduces(module, trunk, tail, example) -> bool:
    """Whether ``tail(trunk(x))`` equals ``module(x)`` on ``example`` (within float rounding)."""
    reference = _reference_output(module, example)
    was_training = module.training
    module.eval()
    try:
        with torch.no_grad():
            rebuilt = tail(trunk(example))
    except Exception:  # any failure means this split is not the forward
        return False
    finally:
        module.train(was_training)
    if not isinstance(rebuilt, torch.Tensor) or rebuilt.shape != reference.shape:
        return False
    scale = reference.abs().max().clamp_min(1e-6)
    return bool(((rebuilt - reference).abs().max() / scale) <= _SPLIT_RTOL)


def _reference_output(module, example) -> torch.Tensor:
    was_training = module.training
    module.eval()
    try:
        with torch.no_grad():
            reference = module(example)
    finally:
        module.train(was_training)
    if not isinstance(reference, torch.Tensor) or reference.ndim != 2:
        raise InvarianceError("the encoder's output is not a pooled (N, D) feature matrix; alignment needs one")
    return reference


def preprocessed(paths, encoder) -> torch.Tensor:
    """The images at ``paths`` as the encoder's input batch, on the encoder's device."""
    from ..data import load_rgb

    return torch.stack([encoder.preprocess(load_rgb(p)) for p in paths]).to(encoder.device)


@torch.no_grad()
def trunk_activations(paths, encoder, trunk: nn.Module, batch_size: int) -> torch.Tensor:
    """The frozen trunk's output for every image, ``batch_size`` images per forward pass.

    Run once per image: the trunk is frozen, so every training step reuses these.
    """
    chunks = [trunk(preprocessed(paths[start:start + batch_size], encoder))
              for start in range(0, len(paths), batch_size)]
    return torch.cat(chunks)


@torch.no_grad()
def tail_features(tail: nn.Module, activations: torch.Tensor) -> torch.Tensor:
    """The tail's features of cached activations, without gradients."""
    return torch.cat([tail(activations[i:i + _FEATURE_CHUNK]) for i in range(0, len(activations), _FEATURE_CHUNK)])
