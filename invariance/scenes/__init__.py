"""Procedural paired scenes of a parts-sorting workbench seen from above.

Each pair is a *clean* view and a *cluttered* view of the same scene:

- the **clean** view is a plain work surface (one even colour with a very slight even
  shading), one target part and even light;
- the **cluttered** view is the same scene with up to three independent clutter factors,
  each with a severity 0-3 (0 = off):

  * ``surface``: a textured or patterned work surface (:mod:`.surfaces`);
  * ``distractors``: other parts and tools lying on the bench (:mod:`.distractors`);
  * ``lighting``: a brightness gradient, a colour tint and a soft shadow band
    (:mod:`.lighting`).

The target is the same in both views and is never lit or covered: every pixel at least
half covered by it (``labels["_mask"]``, or :func:`target_mask`) is byte-identical in the
two views, so "clean and cluttered differ only off the target" can be checked exactly.

Modules, in drawing order:

:mod:`.params`
    factors, part kinds, sizes and the checks of a request;
:mod:`.palette`, :mod:`.shapes`, :mod:`.raster`
    colours, outlines of parts and tools, antialiased drawing and compositing;
:mod:`.surfaces`, :mod:`.distractors`, :mod:`.lighting`
    the three clutter factors (and the plain bench);
:mod:`.sampler`
    one pair: the scene, the clutter choice and its random streams (:func:`render_pair`);
:mod:`.writer`
    a data set folder and its ``labels.csv`` (:func:`generate_scenes`);
:mod:`.masks`
    where each clutter factor acts in a pair, from its seed (:func:`clutter_masks`).
"""

from __future__ import annotations

from .distractors import DISTRACTOR_COUNTS
from .masks import MASK_NAMES, clutter_masks, render_views
from .palette import HANDLE_COLOURS, MIN_TARGET_CONTRAST, PART_COLOURS, SURFACE_COLOURS, TOOL_STEEL
from .params import FACTORS, MAX_LEVEL, MAX_SIZE, MIN_SIZE, PART_KINDS
from .sampler import pair_rng, render_pair, target_mask
from .shapes import TOOL_KINDS
from .writer import CSV_HEADER, generate_scenes

__all__ = [
    "CSV_HEADER",
    "DISTRACTOR_COUNTS",
    "FACTORS",
    "HANDLE_COLOURS",
    "MASK_NAMES",
    "MAX_LEVEL",
    "MAX_SIZE",
    "MIN_SIZE",
    "MIN_TARGET_CONTRAST",
    "PART_COLOURS",
    "PART_KINDS",
    "SURFACE_COLOURS",
    "TOOL_KINDS",
    "TOOL_STEEL",
    "clutter_masks",
    "generate_scenes",
    "pair_rng",
    "render_pair",
    "render_views",
    "target_mask",
]
