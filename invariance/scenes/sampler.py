"""One clean / cluttered pair: the scene, the clutter choice and the two renderings.

How clutter is drawn for a pair (:func:`render_pair`):

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
and the clutter of one factor is the same pattern at every severity.

The target is composited last, on top of everything, and lighting changes the surface and
the distractors only, never the target. Every pixel at least half covered by the target
is byte-identical in the two views; pixels covered less than half are blended over each
view's own background.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from .distractors import DISTRACTOR_COUNTS, _distractor_layers
from .lighting import _lighting
from .palette import MIN_TARGET_CONTRAST, PART_COLOURS, SURFACE_COLOURS
from .params import FACTORS, MAX_LEVEL, PART_KINDS, _check_params
from .raster import _composite, _layer_box, _layer_mask, _render_shape, _to_uint8
from .surfaces import _clean_background, _surface_texture

_SCENE, _CHOICE, _SURFACE, _DISTRACTORS, _LIGHTING = range(5)


def _stream_keys(rng: np.random.Generator) -> np.ndarray:
    """One key per independent stream of a pair (made into generators only when used)."""
    return rng.integers(0, 2**63 - 1, size=5, dtype=np.int64)


def _stream(keys: np.ndarray, which: int) -> np.random.Generator:
    """The generator of stream ``which`` (one of ``_SCENE`` ... ``_LIGHTING``)."""
    return np.random.default_rng(int(keys[which]))


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


def _target_layer(scene: dict, size: int):
    """The target part drawn at its pose, as a layer."""
    x, y, r = scene["x"] * size, scene["y"] * size, scene["radius"] * size
    return _render_shape(scene["part"], scene["colour"], x, y, r, scene["angle"], size)


def _choose_clutter(rng: np.random.Generator, factors: tuple[str, ...], level: int | None) -> tuple[int, dict]:
    """The pair's level and each factor's severity, by the rule in the module docstring."""
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


def _cluttered_bench(keys: np.ndarray, scene: dict, bg: np.ndarray, severity: dict) -> np.ndarray:
    """The cluttered view without its target: surface, then distractors, then light.

    ``bg`` may be painted over in place.
    """
    size = bg.shape[1]
    img = bg
    if severity["surface"]:
        img = _surface_texture(_stream(keys, _SURFACE), img, severity["surface"])
    if severity["distractors"]:
        count = DISTRACTOR_COUNTS[severity["distractors"]]
        for layer in _distractor_layers(_stream(keys, _DISTRACTORS), scene, size, count):
            _composite(img, layer)
    if severity["lighting"]:
        img = _lighting(_stream(keys, _LIGHTING), img, severity["lighting"])
    return img


def _with_target(img: np.ndarray, target, mask: np.ndarray, clean: np.ndarray) -> np.ndarray:
    """Composite the unlit target over ``img`` and copy its covered pixels from ``clean``.

    Partly covered edge pixels blend with this view's own background; pixels at least
    half covered are copied from the clean view, so the two views agree on them exactly.
    """
    _composite(img, target)
    out = _to_uint8(img)
    if target is not None:
        rows, cols = _layer_box(target)
        np.copyto(out[rows, cols], clean[rows, cols], where=mask[rows, cols, None])
    return out


def _labels(scene: dict, lvl: int, severity: dict, mask: np.ndarray) -> dict:
    """The label dict :func:`render_pair` returns."""
    return {
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
        Clutter factors that may be active, a non-empty subset of
        :data:`~invariance.scenes.FACTORS` (a comma-separated string is accepted); may be
        empty only with ``level=0``.
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
        cluttered = _with_target(_cluttered_bench(keys, scene, bg, severity), target, mask, clean)
    return clean, cluttered, _labels(scene, lvl, severity, mask)


def pair_rng(seed: int, index: int) -> np.random.Generator:
    """The generator ``generate_scenes`` gives pair ``index`` of ``seed``.

    Parameters
    ----------
    seed, index
        Non-negative integers.

    Returns
    -------
    numpy.random.Generator
        ``np.random.default_rng([seed, index])``, so pair ``index`` does not depend on how
        many pairs are made.
    """
    return np.random.default_rng([int(seed), int(index)])


def target_mask(seed: int, index: int, size: int = 128) -> np.ndarray:
    """Target pixels of pair ``index`` written by ``generate_scenes(seed=seed)``.

    On these pixels the clean and cluttered files are identical; the mask does not depend
    on ``factors`` or ``level``.

    Parameters
    ----------
    seed, index
        As in :func:`pair_rng`.
    size
        Image side in pixels, 32..1024.

    Returns
    -------
    numpy.ndarray
        bool, shape (size, size).
    """
    size, _, _ = _check_params(size, FACTORS, None)
    scene = _scene(_stream(_stream_keys(pair_rng(seed, index)), _SCENE), size)
    return _layer_mask(_target_layer(scene, size), size)
