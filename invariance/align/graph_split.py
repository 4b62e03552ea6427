"""Split an encoder whose forward is not a plain chain of its children, at a torch.fx node.

A ViT concatenates a class token and adds position embeddings between its children, and a
ResNet-style block adds a skip around its body, so running the children in order is not
the forward. ``torch.fx`` records the forward as a graph (as torchvision's feature
extraction utilities do); a node where one activation carries everything the rest of the
graph needs (no skip crosses it) cuts the graph into a trunk that returns that activation
and a tail that starts from it. Only encoders that ``torch.fx`` cannot trace (Python
control flow on tensor values) are refused, with the reason.

References
----------
Reed, J. K. et al. (2022). torch.fx: practical program capture and transformation for deep
learning in Python. MLSys 2022.
"""

from __future__ import annotations

import torch
from torch import fx, nn

from ..errors import InvalidParameter, InvarianceError

# The cut "before the first node": no trunk, the whole forward is the tail.
_WHOLE = -1


def _trace(module: nn.Module) -> fx.GraphModule:
    try:
        return fx.symbolic_trace(module)
    except Exception as exc:  # fx raises many types; the reason is what the user needs
        reason = str(exc).splitlines()[0][:200] if str(exc) else type(exc).__name__
        raise InvarianceError(
            "this encoder cannot be split for alignment: its forward is not the plain sequence of its "
            f"top-level stages and torch.fx cannot trace it ({reason}); wrap the encoder so that its forward "
            "is an nn.Sequential of stages, or pass --train-from a top-level stage that ends a plain chain"
        ) from None


def _cut_points(nodes: list[fx.Node]) -> list[int]:
    """Positions ``i`` where node ``i`` is the only value computed so far that later nodes use."""
    index = {n: i for i, n in enumerate(nodes)}
    last_use = {n: max((index[u] for u in n.users), default=-1) for n in nodes}
    cuts, open_values = [], set()
    for i, n in enumerate(nodes[:-1]):
        if n.op != "get_attr":  # parameters and buffers are not activations: the tail reads them itself
            open_values.add(n)
        open_values = {v for v in open_values if last_use[v] > i}
        if open_values == {n} and n.op != "placeholder":
            cuts.append(i)
    return cuts


def _copy(nodes, graph: fx.Graph, env: dict) -> None:
    def lookup(arg):
        if arg not in env:  # a get_attr from before the cut: the tail reads the same parameter
            env[arg] = graph.node_copy(arg, lookup)
        return env[arg]

    for n in nodes:
        env[n] = graph.node_copy(n, lookup)


def _pieces(traced: fx.GraphModule, cut: int) -> tuple[fx.GraphModule, fx.GraphModule]:
    nodes = list(traced.graph.nodes)
    trunk_graph, tail_graph = fx.Graph(), fx.Graph()
    env: dict = {}
    _copy([n for n in nodes[:cut + 1]], trunk_graph, env)
    trunk_graph.output(env[nodes[cut]])
    tail_env = {nodes[cut]: tail_graph.placeholder("activation")}
    _copy([n for n in nodes[cut + 1:] if n.op != "output"], tail_graph, tail_env)
    output = next(n for n in nodes if n.op == "output")
    tail_graph.output(fx.map_arg(output.args[0], lambda a: tail_env[a]))
    # GraphModule copies references to the root's submodules and parameters, not the
    # tensors: training the tail trains the encoder's own weights.
    return fx.GraphModule(traced, trunk_graph), fx.GraphModule(traced, tail_graph)


def _parameter_count(graph_module: fx.GraphModule) -> int:
    return sum(p.numel() for p in graph_module.parameters())


def _module_path(node: fx.Node) -> str | None:
    return node.target if node.op in ("call_module", "get_attr") else None


def _stage_name(module: nn.Module, nodes: list[fx.Node], cut: int) -> str:
    """The outermost submodule that starts right after the cut (``encoder.layers.encoder_layer_2``)."""
    after = next((_module_path(n) for n in nodes[cut + 1:] if _module_path(n)), None)
    if after is None:
        return nodes[cut + 1].name
    first_use = {}
    for i, n in enumerate(nodes):
        path = _module_path(n)
        while path:
            first_use.setdefault(path, i)
            path = path.rpartition(".")[0]
    parts = after.split(".")
    name = after
    for k in range(len(parts) - 1, 0, -1):
        parent = ".".join(parts[:k])
        if first_use.get(parent, -1) > cut:
            name = parent
        else:
            break
    return name


def _graph_candidates(module, traced, cuts):
    """``(trunk, tail, cut)`` for the whole forward, then every cut, whose tail has parameters."""
    for cut in [_WHOLE, *cuts]:
        trunk, tail = (nn.Identity(), module) if cut == _WHOLE else _pieces(traced, cut)
        if _parameter_count(tail):
            yield trunk, tail, cut


def _choose_cut(module, traced, cuts, train_from, example) -> int:
    nodes = list(traced.graph.nodes)
    if train_from is None:
        from .trunk import _within_budget  # the chain split's rule, on the graph's candidates

        return _within_budget(_graph_candidates(module, traced, cuts), example)[2]
    starts = [i for i, n in enumerate(nodes)
              if (_module_path(n) or "") == train_from or (_module_path(n) or "").startswith(train_from + ".")]
    if not starts:
        raise InvalidParameter("train_from", f"train_from={train_from!r} is not valid: no such stage in this "
                                             f"encoder's forward; pass one of: {', '.join(stage_names(module))}")
    before = [c for c in cuts if c < starts[0]]
    return before[-1] if before else _WHOLE


def stage_names(module: nn.Module) -> list[str]:
    """Names of the stages an encoder can be aligned from (cut points of its fx graph)."""
    traced = _trace(module)
    nodes = list(traced.graph.nodes)
    return [_stage_name(module, nodes, c) for c in _cut_points(nodes)]


def split_graph(module: nn.Module, train_from: str | None, example: torch.Tensor) -> tuple[nn.Module, nn.Module, str]:
    """Trunk and tail of ``module`` cut at a node of its ``torch.fx`` graph.

    Parameters
    ----------
    module : nn.Module
    train_from : str or None
        Dotted submodule path where the tail starts; ``None``: the earliest cut (or the whole
        forward) whose tail costs at most :data:`invariance.align.trunk.TAIL_FLOP_BUDGET`
        per image, else the latest cut with parameters after it.
    example : torch.Tensor
        Preprocessed images; ``tail(trunk(x))`` must reproduce ``module(x)``.

    Returns
    -------
    trunk, tail : nn.Module
    node : str

    Raises
    ------
    InvarianceError
        When the graph cannot be traced or the pieces do not reproduce the encoder. A
        ``train_from`` with no cut before it returns an identity trunk and the whole
        ``module`` as the tail: nothing is cached, everything trains.
    """
    from .trunk import _reproduces

    traced = _trace(module)
    nodes = list(traced.graph.nodes)
    cuts = _cut_points(nodes)
    if not cuts:
        raise InvarianceError("this encoder's forward graph has no point where one activation carries "
                              "everything after it; it cannot be split for alignment")
    cut = _choose_cut(module, traced, cuts, train_from, example)
    if cut == _WHOLE:
        # Nothing before the stage can be cached: the whole forward trains, from the input
        # images (an identity trunk).
        first = next((name for name, child in module.named_children() if any(True for _ in child.parameters())), "input")
        return nn.Identity(), module, train_from or first
    trunk, tail = _pieces(traced, cut)
    node = _stage_name(module, nodes, cut)
    if not any(True for _ in tail.parameters()):
        raise InvalidParameter("train_from", f"train_from={node!r} is not valid: no trainable parameters from there on")
    if not _reproduces(module, trunk, tail, example):
        raise InvarianceError(f"train_from={node!r}: the split graph does not reproduce the encoder's output; "
                              "pass another stage")
    return trunk.eval(), tail.eval(), node
