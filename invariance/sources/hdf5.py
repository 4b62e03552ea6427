"""HDF5 episode files (h5py): one group per episode, a frames dataset under each.

The frames are named by a dataset path pattern such as ``data/*/obs/front_image``: each
``/``-separated part is matched with shell wildcards against the members of the group
above, and the parts matched by wildcards name the episode. Only hard links are
followed: soft and external links, virtual datasets and external storage could make a
file read other files, so they are left out (a hostile file cannot point elsewhere).
"""

from __future__ import annotations

import fnmatch
from pathlib import Path

import h5py

from invariance.errors import InvarianceError

from .base import Episode, Frame, as_rgb, blocks, check_frame_array, check_same_shape, label_columns

EXTENSIONS = (".h5", ".hdf5", ".hdf")

# Datasets listed when a pattern matches nothing (enough to spot the right path).
_LISTED = 12


def _files(path: Path) -> list[Path]:
    if path.is_file():
        return [path]
    if path.is_dir():
        files = sorted(p for p in path.iterdir() if p.suffix.lower() in EXTENSIONS and p.is_file())
        if files:
            return files
        raise InvarianceError(f"{path}: no .h5 or .hdf5 files in this folder; give an HDF5 file or a folder of them")
    raise InvarianceError(f"{path}: no such file or folder; give an HDF5 file or a folder of them")


def _open(path: Path):
    try:
        return h5py.File(path, "r")
    except OSError as err:
        raise InvarianceError(f"{path}: not a readable HDF5 file ({str(err).splitlines()[0]}); check the path") from None


def _hard_members(group, part):
    """(name, object) of the members matching ``part`` reached by hard links only."""
    out = []
    for name in sorted(group.keys()):
        if not fnmatch.fnmatchcase(name, part):
            continue
        if not isinstance(group.get(name, getlink=True), h5py.HardLink):
            continue
        out.append((name, group[name]))
    return out


def match_pattern(root, pattern: str):
    """``[(wildcard parts, dataset)]`` of the datasets matching a ``/`` pattern."""
    parts = [p for p in pattern.strip("/").split("/") if p]
    found = [((), root)]
    for depth, part in enumerate(parts):
        wild = any(c in part for c in "*?[")
        nxt = []
        for matched, group in found:
            if not isinstance(group, h5py.Group):
                continue
            for name, obj in _hard_members(group, part):
                nxt.append(((*matched, name) if wild else matched, obj))
        found = nxt
    return [(m, obj) for m, obj in found if isinstance(obj, h5py.Dataset)]


def _listing(root) -> str:
    shown = []

    def visit(name, obj):
        if isinstance(obj, h5py.Dataset) and len(shown) < _LISTED:
            shown.append(f"{name} {obj.shape} {obj.dtype}")

    root.visititems(visit)
    return "; ".join(shown) if shown else "no datasets"


def _safe(ds, where):
    if ds.is_virtual or ds.external:
        raise InvarianceError(f"{where} is a virtual or externally stored dataset, which would read other files; "
                              f"copy the frames into the file itself")
    check_frame_array(ds.shape, ds.dtype, where)


class HDF5Source:
    """Episodes of one HDF5 file or a folder of them, read frame block by frame block.

    Parameters
    ----------
    path : Path
        A file, or a folder whose ``.h5``/``.hdf5`` files are all read (the episode name
        is then prefixed by the file name).
    frames : str
        Dataset path pattern, e.g. ``data/*/obs/front_image``.
    labels : tuple of (name, pattern)
        Per-frame label datasets with the same wildcards as ``frames``.
    """

    kind = "hdf5"

    def __init__(self, path, frames: str, labels=()):
        self.path, self.pattern, self.label_patterns = Path(path), frames, tuple(labels)
        self.warnings: list[str] = []
        self.episodes = self._scan()

    def _scan(self) -> list[Episode]:
        files = _files(self.path)
        episodes, shapes = [], {}
        for file in files:
            with _open(file) as root:
                matched = match_pattern(root, self.pattern)
                if not matched:
                    raise InvarianceError(
                        f"{file}: the pattern {self.pattern!r} matches no dataset; the file holds: {_listing(root)}"
                    )
                for parts, ds in matched:
                    where = f"{file}:{ds.name}"
                    _safe(ds, where)
                    name = "/".join(parts) or Path(ds.name).name
                    if len(files) > 1:
                        name = f"{file.stem}/{name}"
                    shapes[where] = ds.shape[1:]
                    episodes.append(Episode(name, int(ds.shape[0]), where, (file, ds.name, parts)))
        check_same_shape(shapes, str(self.path))
        return episodes

    def _label_path(self, label_pattern, parts):
        """The label dataset of an episode: the pattern's wildcards filled with its parts."""
        pieces, k = [], 0
        for piece in label_pattern.strip("/").split("/"):
            if any(c in piece for c in "*?[") and k < len(parts):
                piece, k = parts[k], k + 1
            pieces.append(piece)
        return "/".join(pieces)

    def _labels(self, root, episode, indices):
        out = {}
        for name, pattern in self.label_patterns:
            path = self._label_path(pattern, episode.ref[2])
            ds = root.get(path)
            if not isinstance(ds, h5py.Dataset) or ds.is_virtual or ds.external:
                raise InvarianceError(f"{episode.ref[0]}: label {name!r}: no dataset {path!r} beside the frames of "
                                      f"episode {episode.name}; the file holds: {_listing(root)}")
            if ds.shape[:1] != (episode.n_frames,):
                raise InvarianceError(f"{episode.ref[0]}:{path} has {ds.shape[0] if ds.shape else 0} rows but the "
                                      f"episode has {episode.n_frames} frames; a label needs one row per frame")
            out.update(label_columns(name, ds[indices], f"{episode.ref[0]}:{path}"))
        return out

    def read(self, episode: Episode, indices):
        """Frames ``indices`` (sorted) of an episode, read in blocks of consecutive kept frames."""
        file, ds_name, _ = episode.ref
        with _open(file) as root:
            ds = root[ds_name]
            for block in blocks(list(indices)):
                images = ds[block]  # h5py reads increasing index lists in one call
                labels = self._labels(root, episode, block) if self.label_patterns else {}
                for k, index in enumerate(block):
                    yield Frame(episode.name, int(index), as_rgb(images[k]),
                                {n: float(v[k]) for n, v in labels.items()})
