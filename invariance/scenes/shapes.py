"""Outlines of the parts and tools on the bench, as polygons in local units.

A shape is a list of drawing operations in local units (a part fits in the unit disc, a
tool in a disc of radius ~1.05). Each operation is ``(points (N, 2), colour role)``; a
role of ``None`` cuts a hole. The roles are resolved by
:func:`invariance.scenes.palette._resolve_colour`. Local +u points right and +v up in
the reference pose (angle 0).

Every part is drawn without rotational symmetry (the symmetric ones carry a paint mark),
so a part's angle can be read back from its image.
"""

from __future__ import annotations

import math

import numpy as np

from .palette import TOOL_STEEL

TOOL_KINDS = ("wrench", "screwdriver")


def _circle(cx: float, cy: float, r: float, n: int = 28) -> np.ndarray:
    """Regular ``n``-gon inscribed in the circle of centre ``(cx, cy)`` and radius ``r``."""
    t = np.linspace(0.0, 2.0 * np.pi, n, endpoint=False)
    return np.stack([cx + r * np.cos(t), cy + r * np.sin(t)], axis=1)


def _rect(u0: float, v0: float, u1: float, v1: float) -> np.ndarray:
    """Axis-aligned rectangle between two corners."""
    return np.array([[u0, v0], [u1, v0], [u1, v1], [u0, v1]], dtype=float)


def _hexagon(cx: float, cy: float, r: float, phase: float = 0.0) -> np.ndarray:
    """Regular hexagon of circumradius ``r``, first corner at angle ``phase``."""
    t = phase + np.arange(6) * (np.pi / 3)
    return np.stack([cx + r * np.cos(t), cy + r * np.sin(t)], axis=1)


def _poly(*uv: float) -> np.ndarray:
    """Polygon from a flat list ``u0, v0, u1, v1, ...``."""
    return np.array(uv, dtype=float).reshape(-1, 2)


def _ell(inset: float) -> np.ndarray:
    """Flat L bracket outline: a long arm along the top, a shorter one down the left."""
    a, b, t = 0.9 - inset, 0.62 - inset, 0.42 - 2 * inset
    return _poly(-a, b, a, b, a, b - t, -a + t, b - t, -a + t, -b, -a, -b)


def _gear_outline(teeth: int = 10, root: float = 0.74, tip: float = 0.96) -> np.ndarray:
    """Spur gear rim: each tooth rises from the root circle to a flat tip and back."""
    pts = []
    step = 2.0 * np.pi / teeth
    for k in range(teeth):
        a = k * step
        for frac, r in ((0.0, root), (0.18, tip), (0.5, tip), (0.68, root)):
            pts.append((r * math.cos(a + frac * step), r * math.sin(a + frac * step)))
    return np.array(pts)


_HANDLE = np.array([[-1.0, -0.1], [-0.92, -0.16], [-0.3, -0.16], [-0.22, -0.1]])
_HANDLE = np.concatenate([_HANDLE, _HANDLE[::-1] * (1, -1)])  # mirrored about the long axis


def _part_shapes() -> dict[str, list]:
    """Drawing operations of the target parts (:data:`~invariance.scenes.PART_KINDS`)."""
    thread = [(_rect(u, -0.15, u + 0.05, 0.15), "dark") for u in np.linspace(-0.25, 0.8, 8)]
    return {
        # Hex head on the left, threaded shank to the right, chamfered tip.
        "bolt": [
            (_poly(-0.5, -0.14, 0.9, -0.14, 0.98, -0.07, 0.98, 0.07, 0.9, 0.14, -0.5, 0.14), "base"),
            *thread,
            (_hexagon(-0.72, 0.0, 0.3), "dark"),
            (_hexagon(-0.72, 0.0, 0.24), "base"),
        ],
        # Hexagon, lighter chamfer ring, hole, paint mark.
        "nut": [
            (_hexagon(0.0, 0.0, 0.82, math.pi / 6), "dark"),
            (_hexagon(0.0, 0.0, 0.74, math.pi / 6), "base"),
            (_circle(0.0, 0.0, 0.6), "light"),
            (_circle(0.0, 0.0, 0.34), None),
            (_circle(0.0, 0.64, 0.1, 12), "mark"),
        ],
        # Flat ring with a wide hole, paint mark.
        "washer": [
            (_circle(0.0, 0.0, 0.78, 36), "dark"),
            (_circle(0.0, 0.0, 0.72, 36), "base"),
            (_circle(0.0, 0.0, 0.5, 28), None),
            (_circle(0.64, 0.0, 0.09, 12), "mark"),
        ],
        # Spur gear: teeth, darker hub, bore, paint mark.
        "gear": [
            (_gear_outline(), "base"),
            (_circle(0.0, 0.0, 0.42), "dark"),
            (_circle(0.0, 0.0, 0.34), "base"),
            (_circle(0.0, 0.0, 0.18, 20), None),
            (_circle(0.55, 0.0, 0.09, 12), "mark"),
        ],
        # Flat L bracket, arms of unequal length, two mounting holes.
        "bracket": [
            (_ell(0.0), "dark"),
            (_ell(0.05), "base"),
            (_circle(0.55, 0.41, 0.1, 16), None),
            (_circle(-0.68, -0.3, 0.1, 16), None),
        ],
    }


def _tool_shapes() -> dict[str, list]:
    """Drawing operations of the tools that only ever appear as distractors."""
    return {
        # Combination-style wrench: ring end left, open jaw right.
        "wrench": [
            (_rect(-0.78, -0.09, 0.76, 0.09), "base"),
            (_circle(-0.8, 0.0, 0.21), "base"),
            (_hexagon(-0.8, 0.0, 0.11), None),
            (_circle(0.82, 0.0, 0.23), "base"),
            (_rect(0.84, -0.09, 1.1, 0.09), None),
            (_rect(-0.5, -0.04, 0.5, 0.04), "dark"),
        ],
        # Screwdriver: coloured handle, steel shaft and flat tip (explicit steel colour).
        "screwdriver": [
            (_HANDLE, "base"),
            (_rect(-0.92, -0.05, -0.3, 0.05), "dark"),
            (_rect(-0.22, -0.035, 0.86, 0.035), TOOL_STEEL[0]),
            (_poly(0.86, -0.035, 0.98, -0.055, 0.98, 0.055, 0.86, 0.035), TOOL_STEEL[1]),
        ],
    }


def _stack(ops: list) -> tuple[np.ndarray, list[tuple[int, int]], list]:
    """All of a shape's points in one array (one transform per draw); flat-list bounds."""
    bounds, start = [], 0
    for pts, _ in ops:
        bounds.append((2 * start, 2 * (start + len(pts))))
        start += len(pts)
    return np.concatenate([p for p, _ in ops]), bounds, [r for _, r in ops]


_SHAPES = {kind: _stack(ops) for kind, ops in {**_part_shapes(), **_tool_shapes()}.items()}
