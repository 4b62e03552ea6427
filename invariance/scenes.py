"""Procedural paired scenes of a parts-sorting workbench seen from above.

Each pair is a *clean* view and a *cluttered* view of the same scene:

- the **clean** view is a plain work surface (one even colour with a very slight even
  shading), one target part and even light;
- the **cluttered** view is the same scene with up to three independent clutter factors,
  each with a severity 0-3 (0 = off):

  * ``surface``: a textured or patterned work surface (wood grain, cutting-mat grid,
    speckled epoxy, perforated sheet); severity sets the contrast (and, for speckle and
    perforation, the density);
  * ``distractors``: other parts (other kinds, other colours than the target) and tools
    (wrench, screwdriver) lying on the bench; severity sets the count (0, 2, 4, 7);
  * ``lighting``: a brightness gradient, a colour tint and a soft shadow band; severity
    sets the strength.

The target is the same in both views. It is composited last, on top of everything, and
**lighting changes the surface and the distractors only, never the target**. Every pixel
at least half covered by the target (``labels["_mask"]``, or :func:`target_mask`) is
byte-identical in the two views; pixels covered less than half are blended over each
view's own background. So "clean and cluttered differ only off the target" can be
checked exactly.

How clutter is drawn for a pair (``render_pair``):

- ``level=None`` (default): the pair's level is drawn uniformly from 1, 2, 3;
- ``level=0``: no factor is active and the cluttered view equals the clean one (a
  control);
- each factor listed in ``factors`` is active independently with probability 1/2; when
  the level is above 0 and none came up active, one of ``factors`` is chosen uniformly, so
  at least one factor is always active. Every active factor gets severity = level; factors
  not listed in ``factors`` stay 0. With a fixed level and a single factor every pair has
  exactly that factor at that level (a factor sweep).

Randomness: a pair's generator is split into independent streams (clutter choice, scene,
surface, distractors, lighting). The clean view depends only on the scene stream, so the
same ``(seed, index)`` gives the same clean scene whatever ``factors`` and ``level`` are,
and the clutter of one factor is the same pattern at every severity (the 2 distractors of
severity 1 are the first 2 of the 7 of severity 3). ``generate_scenes`` gives pair ``i``
the generator ``np.random.default_rng([seed, i])`` (:func:`pair_rng`), so pair ``i`` does
not depend on how many pairs are made. The same seed gives byte-identical files with the
same numpy and Pillow versions on the same platform.

Labels (``labels.csv`` and the dict returned by ``render_pair``):

``part``
    target kind, one of :data:`PART_KINDS`.
``x``, ``y``
    target centre, normalised to 0..1 of the image width and height, measured from the
    left and top edges (pixel ``(col, row)`` spans ``[col, col + 1) / size``).
``angle``
    target rotation in degrees, in [-90, 90), counter-clockwise as seen on screen, from the
    part's reference pose. Every part is drawn without rotational symmetry (the
    symmetric ones carry a paint mark), so the angle is identifiable from the image and
    its range has no wrap-around.
``factor_surface``, ``factor_distractors``, ``factor_lighting``
    severity 0-3 of each factor in the cluttered view.
``level``
    the pair's clutter level (0-3); active factors have severity = level.
"""

from __future__ import annotations

import csv
import functools
import io
import math
import os
import pathlib
from typing import Callable, Sequence

import numpy as np
from PIL import Image, ImageDraw

from invariance._io import atomic_directory
from invariance.errors import InvarianceError

FACTORS = ("surface", "distractors", "lighting")
PART_KINDS = ("bolt", "nut", "washer", "gear", "bracket")

CSV_HEADER = (
    "file",
    "part",
    "x",
    "y",
    "angle",
    "factor_surface",
    "factor_distractors",
    "factor_lighting",
    "level",
)

MIN_SIZE, MAX_SIZE = 32, 1024
MAX_LEVEL = 3
# Distractor count per severity (the brief's 0, 2, 4, 7: a dense bench at level 3).
DISTRACTOR_COUNTS = (0, 2, 4, 7)

# Work-surface colours (RGB): light grey laminate, steel grey, beige board, green mat,
# blue-grey mat. Chosen by eye to look like common bench tops.
SURFACE_COLOURS = (
    (182, 182, 176),
    (146, 150, 156),
    (198, 186, 162),
    (92, 124, 100),
    (104, 118, 140),
)
# Part finishes (RGB): bright steel, brass, black oxide, zinc yellow, blue anodised,
# red paint, copper.
PART_COLOURS = (
    (196, 200, 206),
    (192, 154, 64),
    (46, 46, 52),
    (214, 190, 80),
    (52, 92, 172),
    (172, 46, 40),
    (186, 104, 62),
)
# Screwdriver handle colours; wrench finishes.
HANDLE_COLOURS = ((200, 40, 36), (228, 188, 40), (40, 96, 190), (40, 140, 70), (30, 30, 34))
TOOL_STEEL = ((168, 172, 180), (120, 124, 132))
# A target must stand out from the bench: RGB distance to the surface colour (by eye:
# below ~70 a part starts to vanish at 64 px).
MIN_TARGET_CONTRAST = 70.0

_SCENE, _CHOICE, _SURFACE, _DISTRACTORS, _LIGHTING = range(5)


def _stream_keys(rng: np.random.Generator) -> np.ndarray:
    """One key per independent stream of a pair (made into generators only when used)."""
    return rng.integers(0, 2**63 - 1, size=5, dtype=np.int64)


def _stream(keys: np.ndarray, which: int) -> np.random.Generator:
    return np.random.default_rng(int(keys[which]))


# --------------------------------------------------------------------------- validation


def _check_factors(factors) -> tuple[str, ...]:
    if factors is None:
        raise InvarianceError(f"factors must be a subset of {','.join(FACTORS)}, got None")
    if isinstance(factors, str):
        factors = [f for f in (p.strip() for p in factors.split(",")) if f]
    try:
        items = list(factors)
    except TypeError:
        raise InvarianceError(
            f"factors must be a subset of {','.join(FACTORS)}, got {factors!r}"
        ) from None
    unknown = [f for f in items if f not in FACTORS]
    if unknown:
        raise InvarianceError(
            f"unknown clutter factor {unknown[0]!r}: choose from {','.join(FACTORS)}"
        )
    return tuple(f for f in FACTORS if f in items)


def _check_params(size, factors, level) -> tuple[int, tuple[str, ...], int | None]:
    if isinstance(size, bool) or not isinstance(size, (int, np.integer)) or not (
        MIN_SIZE <= size <= MAX_SIZE
    ):
        raise InvarianceError(f"size must be an integer from {MIN_SIZE} to {MAX_SIZE} pixels, got {size!r}")
    if level is not None and (
        isinstance(level, bool) or not isinstance(level, (int, np.integer)) or not (0 <= level <= MAX_LEVEL)
    ):
        raise InvarianceError(f"level must be 0, 1, 2, 3 or None (random 1-3 per pair), got {level!r}")
    factors = _check_factors(factors)
    if not factors and level != 0:
        raise InvarianceError(
            "factors is empty: choose at least one of "
            f"{','.join(FACTORS)}, or use level 0 for identical control pairs"
        )
    return int(size), factors, None if level is None else int(level)


# --------------------------------------------------------------------------- shapes
#
# A shape is a list of drawing operations in local units (the part fits in the unit
# disc, tools in a disc of radius ~1.05). Each op is (points (N, 2), colour role); a
# colour role of None cuts a hole (transparent). Roles: "base", "dark", "light", "mark"
# (a paint dot) or an explicit RGB tuple. Local +u points right and +v up in the
# reference pose (angle 0).


def _circle(cx: float, cy: float, r: float, n: int = 28) -> np.ndarray:
    t = np.linspace(0.0, 2.0 * np.pi, n, endpoint=False)
    return np.stack([cx + r * np.cos(t), cy + r * np.sin(t)], axis=1)


def _rect(u0: float, v0: float, u1: float, v1: float) -> np.ndarray:
    return np.array([[u0, v0], [u1, v0], [u1, v1], [u0, v1]], dtype=float)


def _hexagon(cx: float, cy: float, r: float, phase: float = 0.0) -> np.ndarray:
    t = phase + np.arange(6) * (np.pi / 3)
    return np.stack([cx + r * np.cos(t), cy + r * np.sin(t)], axis=1)


def _poly(*uv: float) -> np.ndarray:
    return np.array(uv, dtype=float).reshape(-1, 2)


def _ell(inset: float) -> np.ndarray:
    """Flat L bracket outline: a long arm along the top, a shorter one down the left."""
    a, b, t = 0.9 - inset, 0.62 - inset, 0.42 - 2 * inset
    return _poly(-a, b, a, b, a, b - t, -a + t, b - t, -a + t, -b, -a, -b)


def _gear_outline(teeth: int = 10, root: float = 0.74, tip: float = 0.96) -> np.ndarray:
    pts = []
    step = 2.0 * np.pi / teeth
    for k in range(teeth):
        a = k * step
        for frac, r in ((0.0, root), (0.18, tip), (0.5, tip), (0.68, root)):
            pts.append((r * math.cos(a + frac * step), r * math.sin(a + frac * step)))
    return np.array(pts)


_HANDLE = np.array([[-1.0, -0.1], [-0.92, -0.16], [-0.3, -0.16], [-0.22, -0.1]])
_HANDLE = np.concatenate([_HANDLE, _HANDLE[::-1] * (1, -1)])  # mirrored about the long axis


def _build_shapes() -> dict[str, list]:
    thread = [(_rect(u, -0.15, u + 0.05, 0.15), "dark") for u in np.linspace(-0.25, 0.8, 8)]
    shapes = {
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
    return shapes


def _stack(ops: list) -> tuple[np.ndarray, list[tuple[int, int]], list]:
    """All of a shape's points in one array (one transform per draw); flat-list bounds."""
    bounds, start = [], 0
    for pts, _ in ops:
        bounds.append((2 * start, 2 * (start + len(pts))))
        start += len(pts)
    return np.concatenate([p for p, _ in ops]), bounds, [r for _, r in ops]


_SHAPES = {kind: _stack(ops) for kind, ops in _build_shapes().items()}
TOOL_KINDS = ("wrench", "screwdriver")


@functools.lru_cache(maxsize=512)
def _resolve_colour(role, base: tuple[int, int, int]) -> tuple[int, int, int, int]:
    """Opaque RGBA fill for a colour role; a hole (role None) is transparent black."""
    if role is None:
        return (0, 0, 0, 0)
    if isinstance(role, tuple):
        return (*role, 255)
    b = np.asarray(base, dtype=float)
    if role == "base":
        out = b
    elif role == "dark":
        out = b * 0.62
    elif role == "light":
        out = b * 1.12 + 22
    elif role == "mark":  # white paint on dark finishes, dark red on light ones
        lum = 0.299 * b[0] + 0.587 * b[1] + 0.114 * b[2]
        out = np.array([240.0, 240.0, 236.0]) if lum < 150 else np.array([150.0, 24.0, 24.0])
    else:  # pragma: no cover - programming error
        raise ValueError(role)
    return (*(int(v) for v in np.clip(np.rint(out), 0, 255)), 255)


def _supersample(size: int) -> int:
    """Subpixel factor for antialiased shapes: 3x3 up to 256 px, 2x2 above (speed)."""
    return 3 if size <= 256 else 2


def _render_shape(kind: str, colour, cx: float, cy: float, radius: float, angle_deg: float, size: int):
    """Draw one shape antialiased (box-filtered supersampling) in a local patch.

    Returns ``(premultiplied RGB float32 (3, h, w), alpha float32 (h, w), row0, col0)``
    or ``None`` when the shape falls outside the image. ``cx``, ``cy`` and ``radius`` are
    in output pixels. The patch is drawn in Pillow's premultiplied "RGBa" mode, whose
    ``reduce`` averages premultiplied values, which is what compositing needs.
    """
    pts, bounds, roles = _SHAPES[kind]
    a = math.radians(angle_deg)
    ca, sa = math.cos(a), math.sin(a)
    # local (u, v) -> screen: x = cx + R (u cos - v sin), y = cy - R (u sin + v cos)
    xy = pts @ (np.array([[ca, -sa], [-sa, -ca]]) * radius) + (cx, cy)
    lo, hi = xy.min(axis=0), xy.max(axis=0)
    c0, r0 = max(0, int(lo[0]) - 1), max(0, int(lo[1]) - 1)
    c1, r1 = min(size, int(hi[0]) + 2), min(size, int(hi[1]) + 2)
    if c1 <= c0 or r1 <= r0:
        return None
    s = _supersample(size)
    w, h = c1 - c0, r1 - r0
    canvas = Image.new("RGBa", (w * s, h * s))
    draw = ImageDraw.Draw(canvas)
    flat = ((xy - (c0, r0)) * s).ravel().tolist()
    colour = tuple(colour)
    for (i0, i1), role in zip(bounds, roles):
        draw.polygon(flat[i0:i1], fill=_resolve_colour(role, colour))
    if s > 1:
        canvas = canvas.reduce(s)
    arr = np.asarray(canvas, dtype=np.float32).transpose(2, 0, 1)
    return arr[:3], arr[3] * np.float32(1.0 / 255.0), r0, c0


def _composite(img: np.ndarray, layer) -> None:
    """Paint a premultiplied layer over ``img`` (float32 (3, H, W)) in place."""
    if layer is None:
        return
    prem, alpha, r0, c0 = layer
    h, w = alpha.shape
    region = img[:, r0 : r0 + h, c0 : c0 + w]
    region *= 1.0 - alpha
    region += prem


# --------------------------------------------------------------------------- scene
#
# Images are float32 (3, H, W) (channel-first: per-pixel factors broadcast over the
# leading axis, which numpy does fast) until the final conversion to uint8 (H, W, 3).


@functools.lru_cache(maxsize=8)
def _grid(size: int) -> tuple[np.ndarray, np.ndarray]:
    c = (np.arange(size, dtype=np.float32) + 0.5) / size
    return c[None, :], c[:, None]  # x (1, n), y (n, 1) in 0..1, pixel centres


def _smooth_noise(rng: np.random.Generator, size: int, cells: int) -> np.ndarray:
    """Value noise: a (cells+1)^2 grid of N(0, 1) values, smoothstep-interpolated to size^2."""
    g = rng.standard_normal((cells + 1, cells + 1), dtype=np.float32)
    t = (np.arange(size, dtype=np.float32) + 0.5) * (cells / size)
    i0 = np.minimum(t.astype(np.int64), cells - 1)
    f = t - i0.astype(np.float32)
    f = f * f * (3.0 - 2.0 * f)
    rows = g[i0] * (1.0 - f)[:, None] + g[i0 + 1] * f[:, None]  # (size, cells+1)
    return rows[:, i0] * (1.0 - f)[None, :] + rows[:, i0 + 1] * f[None, :]


def _clip01(a: np.ndarray) -> np.ndarray:
    return np.minimum(np.maximum(a, 0.0), 1.0)  # np.clip's Python wrapper costs more here


def _col(rgb) -> np.ndarray:
    return np.asarray(rgb, dtype=np.float32).reshape(3, 1, 1)


def _scene(rng: np.random.Generator, size: int) -> dict:
    """Draw the scene: bench colour and shading, target kind, pose, scale and colour."""
    surface = SURFACE_COLOURS[rng.integers(len(SURFACE_COLOURS))]
    candidates = [c for c in PART_COLOURS if math.dist(c, surface) >= MIN_TARGET_CONTRAST]
    colour = candidates[rng.integers(len(candidates))]
    kind = PART_KINDS[rng.integers(len(PART_KINDS))]
    x, y = rng.uniform(0.22, 0.78, size=2)
    angle = rng.uniform(-90.0, 90.0)
    scale = rng.uniform(0.14, 0.17)  # part radius as a fraction of the image side
    shade_dir = rng.uniform(0.0, 2.0 * np.pi)
    return {
        "surface": surface,
        "shade": (math.cos(shade_dir), math.sin(shade_dir)),
        "part": kind,
        "colour": colour,
        "x": float(x),
        "y": float(y),
        "angle": float(angle),
        "radius": float(scale),
    }


def _clean_background(scene: dict, size: int) -> np.ndarray:
    """Plain bench: one colour with a very slight even shading (+-1.5 %)."""
    x, y = _grid(size)
    dx, dy = scene["shade"]
    shade = 1.0 + 0.03 * ((x - 0.5) * dx + (y - 0.5) * dy)
    return _col(scene["surface"]) * shade


def _target_layer(scene: dict, size: int):
    x, y, r = scene["x"] * size, scene["y"] * size, scene["radius"] * size
    return _render_shape(scene["part"], scene["colour"], x, y, r, scene["angle"], size)


def _layer_box(layer) -> tuple[slice, slice]:
    _, alpha, r0, c0 = layer
    return slice(r0, r0 + alpha.shape[0]), slice(c0, c0 + alpha.shape[1])


def _layer_mask(layer, size: int) -> np.ndarray:
    """Pixels at least half covered by the layer."""
    mask = np.zeros((size, size), dtype=bool)
    if layer is not None:
        mask[_layer_box(layer)] = layer[1] >= 0.5
    return mask


def _surface_texture(rng: np.random.Generator, bg: np.ndarray, severity: int) -> np.ndarray:
    """Textured bench: wood grain, cutting-mat grid, speckled epoxy or perforated sheet."""
    size = bg.shape[1]
    x, y = _grid(size)
    kind = rng.integers(4)
    s = float(severity)
    if kind == 0:  # wood: planks with grain warped by value noise, tinted towards brown
        theta = rng.uniform(-0.35, 0.35) + (np.pi / 2 if rng.random() < 0.5 else 0.0)
        v = -x * math.sin(theta) + y * math.cos(theta)
        warp = _smooth_noise(rng, size, 4)
        freq = rng.uniform(14.0, 22.0)
        grain = np.sin(2.0 * np.pi * (freq * v + 0.6 * warp))
        grain = np.sign(grain) * np.sqrt(np.abs(grain))
        plank_w = rng.uniform(0.2, 0.3)
        p = v / plank_w + rng.uniform(0, 1)
        plank = rng.uniform(-1.0, 1.0, size=64).astype(np.float32)[np.floor(p).astype(np.int64) % 64]
        seam = _clip01(1.0 - np.abs(p - np.rint(p)) * (plank_w * size / 1.2))
        mod = 1.0 + (0.07 * s) * grain + (0.05 * s) * plank - (0.18 * s) * seam
        base = bg + (0.18 * s) * (_col((150, 104, 64)) - bg)
        return base * mod
    if kind == 1:  # cutting mat: major grid, finer sub-grid from severity 2
        px = size / (6.0 if rng.random() < 0.5 else 8.0)

        def lines(coord, period_px, width_px):
            d = np.abs(((coord * size / period_px) + 0.5) % 1.0 - 0.5) * period_px
            return _clip01(1.0 - d / width_px)

        amount = (0.22 * s) * np.maximum(lines(x, px, 1.1), lines(y, px, 1.1))
        if severity >= 2:
            minor = np.maximum(lines(x, px / 4, 0.7), lines(y, px / 4, 0.7))
            amount = np.maximum(amount, (0.08 * (s - 1)) * minor)
        return bg + amount * (_col((236, 236, 226)) - bg)
    if kind == 2:  # speckled epoxy: blotches, per-pixel grain, dark flecks
        blotch = _smooth_noise(rng, size, 10)
        grain = rng.standard_normal((size, size), dtype=np.float32)
        flecks = rng.random((size, size), dtype=np.float32) < 0.012 * s * s
        mod = 1.0 + (0.045 * s) * blotch + (0.03 * s) * grain - np.float32(0.4) * flecks
        return bg * mod
    # perforated sheet: staggered round holes, denser and darker with severity
    pitch_px = size / (7.0 + 3.0 * s)
    r_px = 0.3 * pitch_px
    col = x * size / pitch_px
    row = y * size / pitch_px
    shift = 0.5 * (np.floor(row) % 2)
    dx = (col + shift) % 1.0 - 0.5
    dy = row % 1.0 - 0.5
    dist = np.sqrt(dx * dx + dy * dy) * pitch_px
    hole = _clip01(r_px - dist + 0.5)
    metal = 1.0 + (0.04 * s) * _smooth_noise(rng, size, 3)
    return bg * (metal * (1.0 - (0.22 * s) * hole))


def _distractor_layers(rng: np.random.Generator, scene: dict, size: int, count: int) -> list:
    """Draw the full set of 7 distractors (fixed stream use), render the first ``count``."""
    layers = []
    tx, ty, tr = scene["x"], scene["y"], scene["radius"]
    other_kinds = [k for k in PART_KINDS if k != scene["part"]]
    other_colours = [c for c in PART_COLOURS if c != scene["colour"]]
    for _ in range(DISTRACTOR_COUNTS[-1]):
        if rng.random() < 0.35:
            kind = TOOL_KINDS[rng.integers(len(TOOL_KINDS))]
            palette = HANDLE_COLOURS if kind == "screwdriver" else TOOL_STEEL
            colour = palette[rng.integers(len(palette))]
            radius = rng.uniform(0.22, 0.3)
        else:
            kind = other_kinds[rng.integers(len(other_kinds))]
            colour = other_colours[rng.integers(len(other_colours))]
            radius = tr * rng.uniform(0.8, 1.1)
        # beside the target, not under it: the centre keeps clear of the target's disc
        for _try in range(8):
            dx, dy = rng.uniform(0.04, 0.96, size=2)
            if math.hypot(dx - tx, dy - ty) >= tr + 0.45 * radius:
                break
        angle = rng.uniform(-180.0, 180.0)
        if len(layers) < count:
            layers.append(_render_shape(kind, colour, dx * size, dy * size, radius * size, angle, size))
    return layers


_TINTS = (
    _col((1.0, 0.0, -1.0)),  # warm (tungsten)
    _col((-1.0, 0.1, 1.0)),  # cool (daylight)
    _col((-0.5, 0.9, -0.4)),  # green cast (old fluorescent tube)
)


def _lighting(rng: np.random.Generator, img: np.ndarray, severity: int) -> np.ndarray:
    """Uneven light: linear gradient, colour tint and a soft shadow band."""
    size = img.shape[1]
    x, y = _grid(size)
    s = float(severity)
    g = rng.uniform(0.0, 2.0 * np.pi)
    ramp = (x - 0.5) * math.cos(g) + (y - 0.5) * math.sin(g)  # about -0.7..0.7
    b = rng.uniform(0.0, np.pi)
    offset = rng.uniform(-0.3, 0.3)
    width = rng.uniform(0.12, 0.25)
    soft = rng.uniform(0.04, 0.1)
    d = np.abs((x - 0.5) * math.cos(b) + (y - 0.5) * math.sin(b) - offset)
    band = _clip01((0.5 * width - d) / soft + 0.5)
    band = band * band * (3.0 - 2.0 * band)
    # biased to darken: strong light only brightens the lit side a little (less clipping)
    gain = (1.0 + (0.17 * s) * (ramp - 0.15)) * (1.0 - (0.15 * s) * band)
    tint = 1.0 + (0.045 * s) * _TINTS[rng.integers(len(_TINTS))]
    out = img * gain
    out *= tint
    return out


def _to_uint8(img: np.ndarray) -> np.ndarray:
    """float (3, H, W) -> rounded (half up), clipped uint8 (H, W, 3)."""
    t = np.clip(img, 0.0, 255.0)
    t += 0.5
    u = t.astype(np.uint8)
    return np.stack((u[0], u[1], u[2]), axis=-1)


def _choose_clutter(rng: np.random.Generator, factors: tuple[str, ...], level: int | None) -> tuple[int, dict]:
    # The same draws whatever the options, so the clutter choice is reproducible.
    drawn_level = int(rng.integers(1, MAX_LEVEL + 1))
    coins = rng.random(len(FACTORS)) < 0.5
    pick = int(rng.integers(max(len(factors), 1)))
    lvl = drawn_level if level is None else level
    severity = {f: 0 for f in FACTORS}
    if lvl == 0:
        return 0, severity
    active = [f for f, c in zip(FACTORS, coins) if c and f in factors] or [factors[pick]]
    for f in active:
        severity[f] = lvl
    return lvl, severity


def render_pair(
    rng: np.random.Generator, size: int = 128, factors: Sequence[str] = FACTORS, level: int | None = None
) -> tuple[np.ndarray, np.ndarray, dict]:
    """Render one clean / cluttered pair of a workbench scene.

    Parameters
    ----------
    rng
        The pair's random generator (``generate_scenes`` uses :func:`pair_rng`).
    size
        Image side in pixels, 32..1024.
    factors
        Clutter factors that may be active, a non-empty subset of :data:`FACTORS` (a
        comma-separated string is accepted); may be empty only with ``level=0``.
    level
        ``None`` draws 1-3 per pair; 0-3 fixes it (0: cluttered equals clean).

    Returns
    -------
    clean, cluttered, labels
        Two uint8 arrays of shape (size, size, 3) and a dict with ``part``, ``x``, ``y``,
        ``angle``, ``factor_surface``, ``factor_distractors``, ``factor_lighting``,
        ``level`` and ``_mask`` (bool (size, size): the target pixels, identical in the
        two views; not written to ``labels.csv``). See the module docstring.
    """
    size, factors, level = _check_params(size, factors, level)
    keys = _stream_keys(rng)
    scene = _scene(_stream(keys, _SCENE), size)
    lvl, severity = _choose_clutter(_stream(keys, _CHOICE), factors, level)

    bg = _clean_background(scene, size)
    target = _target_layer(scene, size)
    mask = _layer_mask(target, size)
    clean_f = bg.copy()
    _composite(clean_f, target)
    clean = _to_uint8(clean_f)

    if lvl == 0:
        cluttered = clean.copy()
    else:
        img = bg
        if severity["surface"]:
            img = _surface_texture(_stream(keys, _SURFACE), img, severity["surface"])
        if severity["distractors"]:
            count = DISTRACTOR_COUNTS[severity["distractors"]]
            for layer in _distractor_layers(_stream(keys, _DISTRACTORS), scene, size, count):
                _composite(img, layer)
        if severity["lighting"]:
            img = _lighting(_stream(keys, _LIGHTING), img, severity["lighting"])
        # the target goes on last, unlit: partly covered edge pixels blend with this view's
        # background, pixels at least half covered are copied from the clean view
        _composite(img, target)
        cluttered = _to_uint8(img)
        if target is not None:  # copy the target's pixels from the clean view
            rows, cols = _layer_box(target)
            np.copyto(cluttered[rows, cols], clean[rows, cols], where=mask[rows, cols, None])

    labels = {
        "part": scene["part"],
        "x": scene["x"],
        "y": scene["y"],
        "angle": scene["angle"],
        "factor_surface": severity["surface"],
        "factor_distractors": severity["distractors"],
        "factor_lighting": severity["lighting"],
        "level": lvl,
        "_mask": mask,
    }
    return clean, cluttered, labels


def pair_rng(seed: int, index: int) -> np.random.Generator:
    """The generator ``generate_scenes`` gives pair ``index`` of ``seed``."""
    return np.random.default_rng([int(seed), int(index)])


def target_mask(seed: int, index: int, size: int = 128) -> np.ndarray:
    """Target pixels (bool (size, size)) of pair ``index`` written by ``generate_scenes(seed=seed)``.

    On these pixels the clean and cluttered files are identical; the mask does not depend
    on ``factors`` or ``level``.
    """
    size, _, _ = _check_params(size, FACTORS, None)
    scene = _scene(_stream(_stream_keys(pair_rng(seed, index)), _SCENE), size)
    return _layer_mask(_target_layer(scene, size), size)


# --------------------------------------------------------------------------- writing


def _png_bytes(arr: np.ndarray) -> bytes:
    buf = io.BytesIO()
    # zlib level 1: half the time of the default 6 for ~10 % larger files (measured on
    # 128 px scenes); no metadata chunks are written, so the bytes are reproducible
    Image.fromarray(arr).save(buf, format="PNG", optimize=False, compress_level=1)
    return buf.getvalue()


def _fmt(v: float) -> str:
    s = f"{v:.4f}"
    return "0.0000" if s == "-0.0000" else s


def generate_scenes(
    out_dir: str | os.PathLike,
    pairs: int = 200,
    size: int = 128,
    seed: int = 0,
    factors: Sequence[str] | str = FACTORS,
    level: int | None = None,
    progress: Callable[[int], None] | None = None,
) -> pathlib.Path:
    """Write a paired data set of workbench scenes.

    Writes ``out_dir/clean/scene_00000.png``, ``out_dir/cluttered/scene_00000.png`` (same
    relative names) and ``out_dir/labels.csv`` (header :data:`CSV_HEADER`, one row per
    pair; x, y and angle to 4 decimals). Everything is built in a temporary sibling folder
    and moved into place at the end, so a failure leaves nothing behind.

    Parameters
    ----------
    out_dir
        A new or empty folder.
    pairs
        Number of pairs, at least 1.
    size, factors, level
        As in :func:`render_pair`.
    seed
        Pair ``i`` uses ``np.random.default_rng([seed, i])``: the same seed gives the same
        files, and pair ``i`` does not depend on ``pairs``.
    progress
        Optional callable, called with the number of pairs written so far.

    Returns
    -------
    pathlib.Path
        ``out_dir``.
    """
    size, factors, level = _check_params(size, factors, level)
    if isinstance(pairs, bool) or not isinstance(pairs, (int, np.integer)) or pairs < 1:
        raise InvarianceError(f"pairs must be an integer of at least 1, got {pairs!r}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InvarianceError(f"seed must be a non-negative integer, got {seed!r}")
    out = pathlib.Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InvarianceError(f"output {out} exists and is not a folder: choose a new or empty folder")
    if out.is_dir() and any(out.iterdir()):
        raise InvarianceError(f"output folder {out} is not empty: choose a new or empty folder")

    width = max(5, len(str(int(pairs) - 1)))
    rows = []
    with atomic_directory(out) as tmp:
        (tmp / "clean").mkdir()
        (tmp / "cluttered").mkdir()
        for i in range(int(pairs)):
            clean, cluttered, lab = render_pair(pair_rng(seed, i), size, factors, level)
            name = f"scene_{i:0{width}d}.png"
            (tmp / "clean" / name).write_bytes(_png_bytes(clean))
            (tmp / "cluttered" / name).write_bytes(_png_bytes(cluttered))
            floats = (_fmt(lab[k]) for k in ("x", "y", "angle"))
            rows.append([name, lab["part"], *floats, *(lab[k] for k in CSV_HEADER[5:])])
            if progress is not None:
                progress(i + 1)
        text = io.StringIO()
        writer = csv.writer(text, lineterminator="\n")
        writer.writerow(CSV_HEADER)
        writer.writerows(rows)
        (tmp / "labels.csv").write_text(text.getvalue(), encoding="utf-8")
    return out
