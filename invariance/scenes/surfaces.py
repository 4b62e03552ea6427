"""The bench top: the plain surface of the clean view and the textured surfaces of clutter.

The ``surface`` clutter factor swaps the plain bench for one of four textures, picked
uniformly: wood grain, a cutting-mat grid, speckled epoxy or a perforated sheet. The
severity (1-3) sets the texture's contrast and, for speckle and perforation, its density.
All textures keep the bench's own colour as their base, so the target's contrast with
the surface stays close to the clean view's.
"""

from __future__ import annotations

import math

import numpy as np

from .raster import _clip01, _col, _grid


def _smooth_noise(rng: np.random.Generator, size: int, cells: int) -> np.ndarray:
    """Value noise: a (cells+1)^2 grid of N(0, 1) values, smoothstep-interpolated to size^2."""
    g = rng.standard_normal((cells + 1, cells + 1), dtype=np.float32)
    t = (np.arange(size, dtype=np.float32) + 0.5) * (cells / size)
    i0 = np.minimum(t.astype(np.int64), cells - 1)
    f = t - i0.astype(np.float32)
    f = f * f * (3.0 - 2.0 * f)
    rows = g[i0] * (1.0 - f)[:, None] + g[i0 + 1] * f[:, None]  # (size, cells+1)
    return rows[:, i0] * (1.0 - f)[None, :] + rows[:, i0 + 1] * f[None, :]


def _clean_background(scene: dict, size: int) -> np.ndarray:
    """Plain bench: one colour with a very slight even shading (+-1.5 %)."""
    x, y = _grid(size)
    dx, dy = scene["shade"]
    shade = 1.0 + 0.03 * ((x - 0.5) * dx + (y - 0.5) * dy)
    return _col(scene["surface"]) * shade


def _wood(rng: np.random.Generator, bg: np.ndarray, x, y, s: float) -> np.ndarray:
    """Planks with grain warped by value noise, tinted towards brown."""
    size = bg.shape[1]
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


def _grid_lines(coord: np.ndarray, size: int, period_px: float, width_px: float) -> np.ndarray:
    """Coverage (0..1) of lines ``width_px`` wide every ``period_px`` along one axis."""
    d = np.abs(((coord * size / period_px) + 0.5) % 1.0 - 0.5) * period_px
    return _clip01(1.0 - d / width_px)


def _cutting_mat(rng: np.random.Generator, bg: np.ndarray, x, y, s: float) -> np.ndarray:
    """Light major grid, with a finer sub-grid from severity 2."""
    size = bg.shape[1]
    px = size / (6.0 if rng.random() < 0.5 else 8.0)
    amount = (0.22 * s) * np.maximum(_grid_lines(x, size, px, 1.1), _grid_lines(y, size, px, 1.1))
    if s >= 2:
        minor = np.maximum(_grid_lines(x, size, px / 4, 0.7), _grid_lines(y, size, px / 4, 0.7))
        amount = np.maximum(amount, (0.08 * (s - 1)) * minor)
    return bg + amount * (_col((236, 236, 226)) - bg)


def _epoxy(rng: np.random.Generator, bg: np.ndarray, x, y, s: float) -> np.ndarray:
    """Speckled epoxy: soft blotches, per-pixel grain and dark flecks."""
    size = bg.shape[1]
    blotch = _smooth_noise(rng, size, 10)
    grain = rng.standard_normal((size, size), dtype=np.float32)
    flecks = rng.random((size, size), dtype=np.float32) < 0.012 * s * s
    mod = 1.0 + (0.045 * s) * blotch + (0.03 * s) * grain - np.float32(0.4) * flecks
    return bg * mod


def _perforated(rng: np.random.Generator, bg: np.ndarray, x, y, s: float) -> np.ndarray:
    """Perforated sheet: staggered round holes, denser and darker with severity."""
    size = bg.shape[1]
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


_TEXTURES = (_wood, _cutting_mat, _epoxy, _perforated)


def _surface_texture(rng: np.random.Generator, bg: np.ndarray, severity: int) -> np.ndarray:
    """Textured bench over ``bg`` at ``severity`` 1-3; ``bg`` is not changed."""
    x, y = _grid(bg.shape[1])
    texture = _TEXTURES[rng.integers(len(_TEXTURES))]
    return texture(rng, bg, x, y, float(severity))
