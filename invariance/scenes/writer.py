"""Writing a paired data set of workbench scenes to a folder.

Layout: ``clean/scene_00000.png`` and ``cluttered/scene_00000.png`` (same relative names,
zero-padded to at least 5 digits) and ``labels.csv`` with one row per pair:

``file``
    the image's name in both folders.
``part``
    target kind, one of :data:`~invariance.scenes.PART_KINDS`.
``x``, ``y``
    target centre, normalised to 0..1 of the image width and height, measured from the
    left and top edges (pixel ``(col, row)`` spans ``[col, col + 1) / size``).
``angle``
    target rotation in degrees, in [-90, 90), counter-clockwise as seen on screen, from the
    part's reference pose. Every part is drawn without rotational symmetry, so the angle
    is identifiable from the image and its range has no wrap-around.
``factor_surface``, ``factor_distractors``, ``factor_lighting``
    severity 0-3 of each factor in the cluttered view.
``level``
    the pair's clutter level (0-3); active factors have severity = level.

The same seed gives byte-identical files with the same numpy and Pillow versions on the
same platform.
"""

from __future__ import annotations

import csv
import io
import os
import pathlib
from typing import Callable, Sequence

import numpy as np
from PIL import Image

from invariance._io import atomic_directory, write_new_file
from invariance.errors import InvarianceError

from .params import FACTORS, _check_params, _check_run
from .sampler import pair_rng, render_pair

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
_VIEWS = ("clean", "cluttered")


def _png_bytes(arr: np.ndarray) -> bytes:
    """PNG encoding of a uint8 (H, W, 3) image, with no metadata chunks."""
    buf = io.BytesIO()
    # zlib level 1: half the time of the default 6 for ~10 % larger files (measured on
    # 128 px scenes); no metadata chunks are written, so the bytes are reproducible
    Image.fromarray(arr).save(buf, format="PNG", optimize=False, compress_level=1)
    return buf.getvalue()


def _fmt(v: float) -> str:
    """Four decimals, never a negative zero (so a rounded label cannot flip sign)."""
    s = f"{v:.4f}"
    return "0.0000" if s == "-0.0000" else s


def _csv_row(name: str, labels: dict) -> list:
    """One ``labels.csv`` row in :data:`CSV_HEADER` order."""
    floats = (_fmt(labels[k]) for k in ("x", "y", "angle"))
    return [name, labels["part"], *floats, *(labels[k] for k in CSV_HEADER[5:])]


def _csv_text(rows: list) -> str:
    """``labels.csv`` contents: the header and ``rows``, with ``\\n`` line ends."""
    text = io.StringIO()
    writer = csv.writer(text, lineterminator="\n")
    writer.writerow(CSV_HEADER)
    writer.writerows(rows)
    return text.getvalue()


def _check_out_dir(out: pathlib.Path) -> None:
    """Refuse an output that is a file or a folder with something in it."""
    if out.exists() and not out.is_dir():
        raise InvarianceError(f"output {out} exists and is not a folder: choose a new or empty folder")
    if out.is_dir() and any(out.iterdir()):
        raise InvarianceError(f"output folder {out} is not empty: choose a new or empty folder")


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
        As in :func:`~invariance.scenes.render_pair`.
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
    _check_run(pairs, seed)
    out = pathlib.Path(out_dir)
    _check_out_dir(out)

    width = max(5, len(str(int(pairs) - 1)))
    rows = []
    with atomic_directory(out) as tmp:
        for view in _VIEWS:
            (tmp / view).mkdir()
        for i in range(int(pairs)):
            *images, labels = render_pair(pair_rng(seed, i), size, factors, level)
            name = f"scene_{i:0{width}d}.png"
            for view, image in zip(_VIEWS, images):
                write_new_file(tmp / view / name, _png_bytes(image))
            rows.append(_csv_row(name, labels))
            if progress is not None:
                progress(i + 1)
        write_new_file(tmp / "labels.csv", _csv_text(rows).encode("utf-8"))
    return out
