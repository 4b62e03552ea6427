"""Zarr stores (zarr): one frames array for all episodes and an episode-end index array.

The layout of demonstration replay buffers: ``data/img`` of shape (total frames, H, W, C)
and ``meta/episode_ends`` holding the exclusive end row of each episode, so episode k is
rows ``ends[k-1]:ends[k]``. Arrays of Python objects are refused before any chunk is read
(their codec would unpickle).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import zarr

from invariance.errors import InvarianceError

from .base import Episode, Frame, as_rgb, blocks, check_frame_array, label_columns

DEFAULT_ENDS = "meta/episode_ends"

# Episodes at most: the end-index array is read whole, so it is bounded (8 bytes each).
MAX_EPISODES = 1_000_000


def _open(path: Path):
    if not path.exists():
        raise InvarianceError(f"{path}: no such zarr store; give the folder of a zarr group")
    try:
        return zarr.open_group(str(path), mode="r")
    except Exception as err:  # noqa: BLE001 - zarr raises many kinds for a bad store
        raise InvarianceError(f"{path}: not a readable zarr group ({type(err).__name__}: "
                              f"{str(err).splitlines()[0] if str(err) else ''}); check the path") from None


def _listing(group) -> str:
    shown = []
    for name, arr in group.arrays():
        shown.append(f"{name} {arr.shape} {arr.dtype}")
    for name, sub in group.groups():
        for inner, arr in sub.arrays():
            shown.append(f"{name}/{inner} {arr.shape} {arr.dtype}")
    return "; ".join(shown[:12]) or "no arrays"


def _array(group, path, store: Path):
    try:
        arr = group[path]
    except KeyError:
        arr = None
    if not isinstance(arr, zarr.Array):
        raise InvarianceError(f"{store}: no array {path!r}; the store holds: {_listing(group)}")
    if arr.dtype.kind == "O":
        raise InvarianceError(f"{store}/{path} holds Python objects, which are never loaded; store numbers")
    return arr


def _episode_ends(arr, total: int, where: str) -> np.ndarray:
    if arr.ndim != 1 or arr.dtype.kind not in "iu" or arr.shape[0] > MAX_EPISODES or arr.shape[0] == 0:
        raise InvarianceError(f"{where} has shape {arr.shape} and dtype {arr.dtype}; episode ends must be a 1-D "
                              f"integer array of each episode's exclusive end row")
    ends = np.asarray(arr[:], dtype=np.int64)
    if ends[0] <= 0 or np.any(np.diff(ends) <= 0) or ends[-1] > total:
        raise InvarianceError(f"{where}: episode ends must rise strictly from above 0 to at most the {total} "
                              f"frames; got {ends[:5].tolist()}... ending {int(ends[-1])}")
    return ends


class ZarrSource:
    """Episodes of one zarr store, read lazily in blocks of kept frames.

    Parameters
    ----------
    path : Path
        The zarr group (folder).
    frames : str
        Path of the frames array inside the group.
    ends : str, default="meta/episode_ends"
        Path of the episode-end index array.
    labels : tuple of (name, path)
        Per-frame arrays of the same length as the frames array.
    """

    kind = "zarr"

    def __init__(self, path, frames: str, ends: str = DEFAULT_ENDS, labels=()):
        self.path, self.frames, self.ends_path, self.label_paths = Path(path), frames, ends, tuple(labels)
        self.warnings: list[str] = []
        group = _open(self.path)
        arr = _array(group, frames, self.path)
        check_frame_array(arr.shape, arr.dtype, f"{self.path}/{frames}")
        self.total = int(arr.shape[0])
        ends_arr = _episode_ends(_array(group, ends, self.path), self.total, f"{self.path}/{ends}")
        for name, lpath in self.label_paths:
            larr = _array(group, lpath, self.path)
            if larr.shape[:1] != (self.total,):
                raise InvarianceError(f"{self.path}/{lpath} has {larr.shape[0] if larr.shape else 0} rows but "
                                      f"{frames} has {self.total}; label {name!r} needs one row per frame")
        starts = np.r_[0, ends_arr[:-1]]
        width = max(4, len(str(len(ends_arr) - 1)))
        self.episodes = [Episode(f"episode_{k:0{width}d}", int(e - s), f"{self.path}/{frames}[{s}:{e}]", int(s))
                         for k, (s, e) in enumerate(zip(starts, ends_arr))]

    def read(self, episode: Episode, indices):
        """Frames ``indices`` of an episode (orthogonal selection of their rows only)."""
        group = _open(self.path)
        arr = group[self.frames]
        label_arrs = {name: group[lpath] for name, lpath in self.label_paths}
        for block in blocks(list(indices)):
            rows = episode.ref + np.asarray(block, dtype=np.int64)
            images = arr.oindex[rows]
            labels = {}
            for name, larr in label_arrs.items():
                labels.update(label_columns(name, larr.oindex[rows], f"{self.path}/{dict(self.label_paths)[name]}"))
            for k, index in enumerate(block):
                yield Frame(episode.name, int(index), as_rgb(images[k]), {n: float(v[k]) for n, v in labels.items()})
