"""What every source hands on: frames one at a time, with their episode, index and labels."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from invariance.errors import InvarianceError

# Largest frame accepted, in bytes (H x W x C of uint8): 4096 x 4096 x 4 = 64 MiB. A bigger
# "frame" is a wrong path or a hostile file, and reading it would cost that much memory for
# one image (common practice).
MAX_FRAME_BYTES = 4096 * 4096 * 4

# Frames read from a file at once: a block of consecutive kept frames, so memory stays at
# most this many frames whatever the episode length (measured in
# tests/benchmarks/bench_sources.py: larger blocks were no faster).
READ_BLOCK = 32


@dataclass
class Frame:
    """One frame: ``episode`` name, ``index`` in the episode, ``image`` (H, W, 3) uint8,
    ``labels`` {name: float} read from the same file."""

    episode: str
    index: int
    image: np.ndarray
    labels: dict = field(default_factory=dict)


@dataclass
class Episode:
    """An episode of a source: its name, frame count (None when only decoding tells) and
    where it lives (for messages)."""

    name: str
    n_frames: int | None
    where: str
    ref: object = None
    group: str | None = None  # the unit of splits; default the episode itself

    def __post_init__(self):
        if self.group is None:
            self.group = self.name


def check_frame_array(shape, dtype, where: str) -> None:
    """Refuse arrays that are not stacks of 8-bit images: (N, H, W) or (N, H, W, 1|3|4) uint8."""
    if np.dtype(dtype).kind == "f":
        raise InvarianceError(
            f"{where} holds {np.dtype(dtype)} values; image frames must be uint8 (0-255): convert with "
            f"(frames * 255).round().astype('uint8') if they are in 0..1"
        )
    if np.dtype(dtype) != np.uint8:
        raise InvarianceError(f"{where} holds {np.dtype(dtype)} values; image frames must be uint8 (0-255)")
    if len(shape) not in (3, 4) or (len(shape) == 4 and shape[3] not in (1, 3, 4)):
        raise InvarianceError(
            f"{where} has shape {tuple(shape)}; frames must be N x H x W x C (C = 1, 3 or 4) or N x H x W"
        )
    frame_bytes = int(np.prod(shape[1:], dtype=np.int64))
    if frame_bytes > MAX_FRAME_BYTES or min(shape[1:3]) < 1:
        raise InvarianceError(f"{where} has frames of shape {tuple(shape[1:])}; at most {MAX_FRAME_BYTES:,} "
                              f"bytes per frame are read")


def check_same_shape(shapes: dict, source: str) -> None:
    """All episodes' frames share one H x W x C; else name two that differ."""
    distinct = {}
    for where, shape in shapes.items():
        distinct.setdefault(tuple(shape), where)
    if len(distinct) > 1:
        (s1, w1), (s2, w2) = list(distinct.items())[:2]
        raise InvarianceError(
            f"{source}: frames of different shapes, {s1} in {w1} and {s2} in {w2}; one source must hold "
            f"frames of one size (one camera): give each camera as its own source"
        )


def as_rgb(frame: np.ndarray) -> np.ndarray:
    """(H, W, 3) uint8 from (H, W), (H, W, 1), (H, W, 3) or (H, W, 4): grey is repeated,
    alpha is dropped (camera frames carry no transparency worth compositing)."""
    if frame.ndim == 2:
        frame = frame[:, :, None]
    if frame.shape[2] == 1:
        return np.repeat(frame, 3, axis=2)
    return np.ascontiguousarray(frame[:, :, :3])


def blocks(indices, size=READ_BLOCK):
    """Consecutive chunks of a sorted index list, each read from the file in one call."""
    for start in range(0, len(indices), size):
        yield list(indices[start:start + size])


def label_columns(name: str, values: np.ndarray, where: str) -> dict:
    """Per-frame label arrays as 1-D float columns: a vector per frame gives NAME[k]."""
    values = np.asarray(values)
    if values.dtype.kind not in "fiub":
        raise InvarianceError(f"{where}: label {name!r} holds {values.dtype} values; labels must be numbers")
    values = values.astype(np.float64)
    if values.ndim == 1:
        return {name: values}
    flat = values.reshape(values.shape[0], -1)
    if flat.shape[1] > 64:
        raise InvarianceError(f"{where}: label {name!r} has {flat.shape[1]} values per frame; at most 64 "
                              f"(a label is a state or action vector, not an image)")
    return {f"{name}[{k}]": flat[:, k] for k in range(flat.shape[1])}
