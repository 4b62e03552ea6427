"""Still-image folders: every image is one frame; labels.csv may name its episode (group)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from invariance.data import LABELS_FILE, _image_names, load_rgb, read_labels
from invariance.errors import InvarianceError

from .base import Episode, Frame


class ImageFolderSource:
    """The images under a folder (any depth), sorted by relative name.

    A ``labels.csv`` beside them (first column the relative name) gives probe labels and,
    in an ``episode`` column, the group of each image: images of one episode are kept
    together by every split. Without it every image is its own group.
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
        table = read_labels(self.path / LABELS_FILE, names) if (self.path / LABELS_FILE).is_file() else None
        self.table = table
        groups = table.groups if table is not None and table.groups is not None else names
        self.episodes = [Episode(n, 1, str(self.path / n), i, str(g)) for i, (n, g) in enumerate(zip(names, groups))]

    def read(self, episode: Episode, indices):
        image = np.asarray(load_rgb(self.path / episode.name))
        labels = {}
        if self.table is not None:
            labels = {k: v[episode.ref] for k, v in self.table.tasks.items()}
        yield Frame(episode.name, 0, image, labels)
