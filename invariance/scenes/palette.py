"""Colours of the workbench: bench tops, part finishes, tool finishes, shading roles."""

from __future__ import annotations

import functools

import numpy as np

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


@functools.lru_cache(maxsize=512)
def _resolve_colour(role, base: tuple[int, int, int]) -> tuple[int, int, int, int]:
    """Opaque RGBA fill for a colour role; a hole (role None) is transparent black.

    Roles are ``"base"`` (the finish), ``"dark"`` (edges, threads), ``"light"`` (a
    chamfer), ``"mark"`` (a paint dot) or an explicit RGB tuple.
    """
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
