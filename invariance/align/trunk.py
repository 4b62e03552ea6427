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


def _default_node(module: nn.Module) -> str:
    with_params = [name for name, child in module.named_children() if any(True for _ in child.parameters())]
    if not with_params:
        raise InvarianceError("the encoder has no top-level stage with parameters; nothing can be aligned")
    return with_params[-1]


def split_module(module: nn.Module, train_from: str | None, example: torch.Tensor) -> tuple[nn.Module, nn.Module, str]:
    """Split ``module`` into a frozen trunk and a trainable tail at a top-level child.

    The split is checked on ``example``: ``tail(trunk(x))`` must equal ``module(x)``,
    otherwise the encoder's forward is not the plain sequence of its children and the
    split would train something else than the encoder.

    Parameters
    ----------
    module : nn.Module
        The encoder's module; it must return a pooled (N, D) feature matrix.
    train_from : str or None
        Top-level child where the tail starts; ``None``: the last child with parameters.
    example : torch.Tensor
        A few preprocessed images to check the split on.

    Returns
    -------
    trunk, tail : nn.Module
        Share the parameters of ``module`` (training the tail trains ``module``).
    node : str
        The child the tail starts at.

    Raises
    ------
    InvarianceError
        When ``train_from`` is not a child, has no trainable stage from there on, or the
        forward is not the sequence of the children.
    """
    children = list(module.named_children())
    names = [name for name, _ in children]
    node = _default_node(module) if train_from is None else train_from
    if node not in names:
        raise InvalidParameter("train_from", f"train_from={node!r} is not valid: not a top-level stage of this "
                                             f"encoder; pass one of: {_children_listing(module)}")
    cut = names.index(node)
    trunk = _Chain([m for _, m in children[:cut]], flatten_end=False)
    tail = _Chain([m for _, m in children[cut:]], flatten_end=True)
    if not any(True for _ in tail.parameters()):
        raise InvalidParameter("train_from", f"train_from={node!r} is not valid: no trainable parameters from there "
                                             f"on; pass an earlier stage of: {_children_listing(module)}")
    _verify_split(module, trunk, tail, node, example)
    return trunk, tail, node


def _verify_split(module, trunk, tail, node, example) -> None:
    was_training = module.training
    module.eval()
    try:
        with torch.no_grad():
            reference = module(example)
            try:
                rebuilt = tail(trunk(example))
            except Exception as exc:  # any failure means the children are not the forward
                rebuilt = exc
    finally:
        module.train(was_training)
    if not isinstance(reference, torch.Tensor) or reference.ndim != 2:
        raise InvarianceError("the encoder's output is not a pooled (N, D) feature matrix; alignment needs one")
    ok = isinstance(rebuilt, torch.Tensor) and rebuilt.shape == reference.shape
    if ok:
        scale = reference.abs().max().clamp_min(1e-6)
        ok = bool(((rebuilt - reference).abs().max() / scale) <= _SPLIT_RTOL)
    if not ok:
        raise InvarianceError(
            f"train_from={node!r}: this encoder cannot be split there (its forward is not the plain "
            f"sequence of its top-level stages: {_children_listing(module)}); pick another stage or encoder"
        )


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
