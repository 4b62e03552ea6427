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
# Share of the encoder's parameters the default tail holds: the smallest run of last stages
# with at least half of them (workbench CNN: block3, 75%; ResNet-18: layer4, 75%; a small
# ViT: its last encoder layers). Fine-tuning the top of a network is the usual transfer
# practice (Yosinski et al., NeurIPS 2014, from memory); one half is common practice.
TRAINED_SHARE = 0.5
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


def _default_node(module: nn.Module) -> str:
    """The first of the last top-level stages that together hold :data:`TRAINED_SHARE` of the parameters."""
    children = list(module.named_children())
    total = _count(module.parameters())
    if total == 0 or not any(_count(child.parameters()) for _, child in children):
        raise InvarianceError("the encoder has no top-level stage with parameters; nothing can be aligned")
    held = 0
    for name, child in reversed(children):
        held += _count(child.parameters())
        if held and held >= TRAINED_SHARE * total:
            return name
    return next(name for name, child in children if _count(child.parameters()))


def split_module(module: nn.Module, train_from: str | None, example: torch.Tensor) -> tuple[nn.Module, nn.Module, str]:
    """Split ``module`` into a frozen trunk and a trainable tail.

    The default tail is the shortest run of last stages that holds :data:`TRAINED_SHARE`
    (half) of the encoder's parameters: the last top-level stages when the forward is the
    plain sequence of its children (workbench CNN: ``block3``; ResNet-18: ``layer4``;
    an ``nn.Sequential``: its last convolution(s)), otherwise the last blocks of the
    forward's ``torch.fx`` graph (a ViT: its last encoder layers), split at a node where
    one activation carries everything the rest needs, as torchvision's feature
    extraction does (see :mod:`invariance.align.graph_split`).

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
        node = _default_node(module)
        chain = _chain_split(module, node)
        if _reproduces(module, *chain, example):
            return (*chain, node)
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
