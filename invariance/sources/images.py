"""Still-image folders: every image is one frame; labels.csv may name its episode (group)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from invariance.data import _image_names, domain_labels, load_rgb
from invariance.errors import InvarianceError

from .base import Episode, Frame


class ImageFolderSource:
    """The images under a folder (any depth), sorted by relative name.

    A ``labels.csv`` beside them (first column the relative name) gives probe labels,
    clutter factors and, in an ``episode`` column, the group of each image: images of one
    episode are kept together by every split. Without it every image is its own group. The
    clean/ or cluttered/ sub-folder of an unpaired data folder may take its rows from the
    data folder's labels.csv instead (:func:`invariance.data.domain_labels`).
    """

    kind = "images"

    def __init__(self, path, labels=()):
        if labels:
            raise InvarianceError("--label reads arrays from HDF5 or zarr files; an image folder takes its labels "
                                  "from labels.csv")
        self.path = Path(path)
        self.warnings: list[str] = []
        if not self.path.is_dir():
            raise InvarianceError(f"{self.path}: no such folder; give a folder of images")
        names = _image_names(self.path)
        if not names:
            raise InvarianceError(f"{self.path}: no images (PNG, JPEG, ...) in this folder")
        table = domain_labels(self.path, names)  # its labels.csv, or an unpaired data folder's
        self.table = table
        groups = table.groups if table is not None and table.groups is not None else names
        self.episodes = [Episode(n, 1, str(self.path / n), i, str(g)) for i, (n, g) in enumerate(zip(names, groups))]

    def read(self, episode: Episode, indices):
        image = np.asarray(load_rgb(self.path / episode.name))
        labels = {}
        if self.table is not None:
            labels = {k: v[episode.ref] for k, v in self.table.tasks.items()}
        yield Frame(episode.name, 0, image, labels)
