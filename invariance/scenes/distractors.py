"""Other parts and tools lying on the bench beside the target.

The ``distractors`` clutter factor adds :data:`DISTRACTOR_COUNTS` ``[severity]`` objects:
parts of other kinds and other finishes than the target (so the target stays the only
one of its kind and colour), and tools. Their centres keep clear of the target's disc;
they may overlap its edge, but the target is drawn on top of them.
"""

from __future__ import annotations

import math

import numpy as np

from .palette import HANDLE_COLOURS, PART_COLOURS, TOOL_STEEL
from .params import PART_KINDS
from .raster import _render_shape
from .shapes import TOOL_KINDS

# Distractor count per severity: a dense bench of 7 objects at level 3.
DISTRACTOR_COUNTS = (0, 2, 4, 7)
# Share of distractors that are tools rather than parts.
_TOOL_SHARE = 0.35
# Placement tries before a distractor is left where the last try put it.
_PLACEMENT_TRIES = 8


def _pick_object(rng: np.random.Generator, scene: dict) -> tuple[str, tuple, float]:
    """Kind, colour and radius (fraction of the image side) of one distractor."""
    if rng.random() < _TOOL_SHARE:
        kind = TOOL_KINDS[rng.integers(len(TOOL_KINDS))]
        palette = HANDLE_COLOURS if kind == "screwdriver" else TOOL_STEEL
        colour = palette[rng.integers(len(palette))]
        return kind, colour, rng.uniform(0.22, 0.3)
    other_kinds = [k for k in PART_KINDS if k != scene["part"]]
    other_colours = [c for c in PART_COLOURS if c != scene["colour"]]
    kind = other_kinds[rng.integers(len(other_kinds))]
    colour = other_colours[rng.integers(len(other_colours))]
    return kind, colour, scene["radius"] * rng.uniform(0.8, 1.1)


def _place(rng: np.random.Generator, scene: dict, radius: float) -> tuple[float, float]:
    """A centre beside the target, not under it: clear of the target's disc when possible."""
    tx, ty, tr = scene["x"], scene["y"], scene["radius"]
    for _try in range(_PLACEMENT_TRIES):
        dx, dy = rng.uniform(0.04, 0.96, size=2)
        if math.hypot(dx - tx, dy - ty) >= tr + 0.45 * radius:
            break
    return dx, dy


def _distractor_layers(rng: np.random.Generator, scene: dict, size: int, count: int) -> list:
    """Layers of the first ``count`` distractors of the scene's fixed set.

    The whole set (``DISTRACTOR_COUNTS[-1]`` objects) is always drawn from ``rng`` so the
    stream is used the same way at every severity: the 2 distractors of severity 1 are
    the first 2 of the 7 of severity 3. Only the first ``count`` are rendered.
    """
    layers = []
    for _ in range(DISTRACTOR_COUNTS[-1]):
        kind, colour, radius = _pick_object(rng, scene)
        dx, dy = _place(rng, scene, radius)
        angle = rng.uniform(-180.0, 180.0)
        if len(layers) < count:
            layers.append(_render_shape(kind, colour, dx * size, dy * size, radius * size, angle, size))
    return layers
