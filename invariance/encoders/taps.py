"""Layer taps: which graph nodes an encoder exposes, and one forward pass that returns them.

Nodes are torch.fx graph nodes as torchvision's feature extraction utilities name them
(``get_graph_node_names``, ``create_feature_extractor``).
"""

from __future__ import annotations

import difflib
from typing import TYPE_CHECKING, Callable

import torch

from invariance.errors import InvalidParameter, InvarianceError

from .messages import _described, _on_images

if TYPE_CHECKING:
    from .encoder import Encoder

# Layer key of the pooled feature before the classifier head, the default tap.
OUTPUT_KEY = "output"


def available_layers(encoder: Encoder) -> list[str]:
    """Names that ``extract_features(layers=...)`` can tap, in forward order.

    Parameters
    ----------
    encoder : Encoder

    Returns
    -------
    list of str
        ``"output"`` (the pooled feature before the head) first, then the eval-mode
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
            f"encoder {encoder.spec} cannot be traced by torch.fx ({_described(exc)}); "
            "use the default output layer only"
        ) from None
    finally:
        encoder.module.eval()  # tracing switches to train mode and back; make sure it is back
    return nodes


def _validate_layers(encoder: Encoder, layers) -> tuple[list[str], list[str] | None]:
    """The requested layers (order kept, repeats dropped) and the graph nodes, when traced."""
    if layers is None:
        return [OUTPUT_KEY], None
    if isinstance(layers, str) or not all(isinstance(n, str) for n in layers) or not layers:
        raise InvalidParameter("layers", f"layers must be a non-empty list of node names, got {layers!r}")
    wanted = list(dict.fromkeys(layers))
    if wanted == [OUTPUT_KEY]:
        return wanted, None
    nodes = _graph_nodes(encoder)
    valid = _tappable(nodes)
    for name in wanted:
        if name not in valid:
            close = difflib.get_close_matches(name, valid, n=5, cutoff=0.4)
            hint = f"nearest: {', '.join(close)}" if close else "list them with available_layers(encoder)"
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
    """(N, D) from a layer's activation: spatial maps averaged, token maps' class token.

    Global average pooling of spatial maps follows Lin et al. 2014 (ICLR, "Network in
    Network"); the class token of (N, T, C) token maps follows Dosovitskiy et al. 2021
    (ICLR, ViT), which puts it first.
    """
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
        return out[:, 0]
    raise InvarianceError(
        f"encoder {spec} layer {layer!r} gave a {out.dim()}-D tensor {tuple(out.shape)}{_on_images(names)}; "
        "expected (N, D), (N, T, C) or (N, C, H, W)"
    )
