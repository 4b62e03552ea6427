"""Uneven light over the bench: a brightness gradient, a colour tint and a shadow band.

The ``lighting`` clutter factor changes every bench pixel. It is applied to the surface
and the distractors only, never to the target, which is composited afterwards. The
severity (1-3) scales all three effects.
"""

from __future__ import annotations

import math

import numpy as np

from .raster import _clip01, _col, _grid

_TINTS = (
    _col((1.0, 0.0, -1.0)),  # warm (tungsten)
    _col((-1.0, 0.1, 1.0)),  # cool (daylight)
    _col((-0.5, 0.9, -0.4)),  # green cast (old fluorescent tube)
)


def _shadow_band(rng: np.random.Generator, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """A straight soft-edged band (0..1) at a random angle, offset and width."""
    b = rng.uniform(0.0, np.pi)
    offset = rng.uniform(-0.3, 0.3)
    width = rng.uniform(0.12, 0.25)
    soft = rng.uniform(0.04, 0.1)
    d = np.abs((x - 0.5) * math.cos(b) + (y - 0.5) * math.sin(b) - offset)
    band = _clip01((0.5 * width - d) / soft + 0.5)
    # smoothstep, so the band's edge has no visible kink
    return band * band * (3.0 - 2.0 * band)


def _lighting(rng: np.random.Generator, img: np.ndarray, severity: int) -> np.ndarray:
    """Uneven light: linear gradient, colour tint and a soft shadow band."""
    size = img.shape[1]
    x, y = _grid(size)
    s = float(severity)
    g = rng.uniform(0.0, 2.0 * np.pi)
    ramp = (x - 0.5) * math.cos(g) + (y - 0.5) * math.sin(g)  # about -0.7..0.7
    band = _shadow_band(rng, x, y)
    # biased to darken: strong light only brightens the lit side a little (less clipping)
    gain = (1.0 + (0.17 * s) * (ramp - 0.15)) * (1.0 - (0.15 * s) * band)
    tint = 1.0 + (0.045 * s) * _TINTS[rng.integers(len(_TINTS))]
    out = img * gain
    out *= tint
    return out
