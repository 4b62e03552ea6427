"""Options of the episode sources, validated once (a frozen object, as invariance.options)."""

from __future__ import annotations

import re
from dataclasses import dataclass

from invariance.errors import InvalidParameter
from invariance.validation import check_bool, check_int

# Largest stride and frame cap accepted: a 30 fps recording of an hour is 108,000 frames,
# so these bounds only refuse typos, never a real recording (common practice).
MAX_STRIDE = 100_000
MAX_FRAMES = 1_000_000

_LABEL_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_.-]{0,63}$")


def _labels(value):
    """``(("NAME", "PATH"), ...)`` from pairs or "NAME=PATH" strings."""
    out = []
    for item in value or ():
        if isinstance(item, str):
            name, sep, path = item.partition("=")
            if not sep:
                raise InvalidParameter("labels", f"label {item!r} is not valid; write --label NAME=PATH, e.g. "
                                                 f"ee_pos=data/*/obs/ee_pos")
            item = (name, path)
        if not (isinstance(item, tuple) and len(item) == 2 and all(isinstance(v, str) for v in item)):
            raise InvalidParameter("labels", f"label {item!r} is not valid; write --label NAME=PATH")
        name, path = item[0].strip(), item[1].strip()
        if not _LABEL_NAME.match(name) or not path:
            raise InvalidParameter("labels", f"label {name}={path} is not valid; NAME is letters, digits, _ . - "
                                             f"(starting with a letter) and PATH the array inside the file")
        out.append((name, path))
    names = [n for n, _ in out]
    if len(set(names)) != len(names):
        raise InvalidParameter("labels", f"labels {names} repeat a name; give each label once")
    return tuple(out)


@dataclass(frozen=True)
class SourceOptions:
    """How frames are drawn from episode sources and how two domains are matched.

    Parameters
    ----------
    stride : int, default=1
        Keep every ``stride``-th frame of an episode (frame indices 0, stride, 2 stride, ...).
        Neighbouring frames of a recording are nearly identical, so a stride costs little
        information and saves extraction time.
    max_frames_per_episode : int, optional
        At most this many of the strided frames per episode, evenly spread over it (for
        videos, whose length is known only once decoded, the first ones).
    labels : tuple of (name, path), default=()
        Per-frame arrays in the same file used as probe targets (``--label NAME=PATH``):
        an HDF5 dataset pattern with the same ``*`` as the frames (``data/*/obs/ee_pos``),
        or a zarr array as long as the frames array. A vector per frame gives one target
        per component (``NAME[0]``, ``NAME[1]``, ...).
    skip_unpaired : bool, default=False
        Paired domains: drop episodes present in one domain only instead of stopping.
    unpaired : bool, default=False
        Treat the two domains as unpaired even when they share episode names.
    """

    stride: int = 1
    max_frames_per_episode: int | None = None
    labels: tuple = ()
    skip_unpaired: bool = False
    unpaired: bool = False

    def __post_init__(self):
        object.__setattr__(self, "stride", check_int("stride", self.stride, low=1, high=MAX_STRIDE))
        object.__setattr__(self, "max_frames_per_episode", check_int(
            "max_frames_per_episode", self.max_frames_per_episode, low=1, high=MAX_FRAMES, allow_none=True))
        object.__setattr__(self, "labels", _labels(self.labels))
        check_bool("skip_unpaired", self.skip_unpaired)
        check_bool("unpaired", self.unpaired)

    def frame_indices(self, n_frames: int, episode: str):
        """Indices of the frames kept from an episode of ``n_frames`` frames."""
        from invariance.errors import InvarianceError

        if n_frames < self.stride:
            raise InvarianceError(
                f"episode {episode} has {n_frames} frames, fewer than the stride {self.stride}; lower "
                f"--stride or leave the episode out"
            )
        kept = range(0, n_frames, self.stride)  # a range: a claimed length costs no memory
        cap = self.max_frames_per_episode
        if cap is not None and len(kept) > cap:
            # evenly spread over the episode, first and last kept
            step = (len(kept) - 1) / max(cap - 1, 1)
            return [kept[round(i * step)] for i in range(cap)] if cap > 1 else [kept[0]]
        return kept
