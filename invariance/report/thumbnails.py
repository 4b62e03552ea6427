"""Small PNG thumbnails of data set images, embedded in the report as ``data:`` URIs."""

from __future__ import annotations

import io
from pathlib import Path
from typing import Mapping

from PIL import Image

from invariance.report import plots

# Side of a thumbnail in pixels: large enough to recognise a part on the bench, small
# enough that a dozen pairs per encoder keep the report light (common practice).
THUMBNAIL_PX = 96


class Thumbnails:
    """Reads data set images once and returns PNG data URIs (``None`` when unreadable).

    Parameters
    ----------
    overrides : path-like or mapping, optional
        Where to find the images when ``dataset.path`` is not valid on this machine: one
        folder for all results, or a mapping from the stored ``dataset.path`` to a folder.
    """

    def __init__(self, overrides=None):
        self._overrides = overrides
        self._cache: dict[Path, str | None] = {}

    def root(self, dataset: dict) -> Path | None:
        """The folder holding ``clean/`` and ``cluttered/`` for ``dataset``, if known."""
        stored = dataset.get("path")
        if isinstance(self._overrides, Mapping):
            chosen = self._overrides.get(stored) or self._overrides.get(str(stored))
        else:
            chosen = self._overrides
        chosen = chosen if chosen is not None else stored
        return Path(chosen) if chosen else None

    def uri(self, dataset: dict, side: str, name: str) -> str | None:
        """A data URI of image ``name`` in the ``side`` folder, or ``None`` when unreadable.

        Parameters
        ----------
        dataset : dict
            The result's ``dataset`` object.
        side : str
            ``"clean"`` or ``"cluttered"``.
        name : str
            File name from the result; it may not reach outside the data set folder.
        """
        root = self.root(dataset)
        if root is None:
            return None
        folder = (root / side).resolve()
        candidate = (folder / str(name)).resolve()
        # A name in a result file must not reach outside the data set folder.
        if not candidate.is_relative_to(folder) or not candidate.is_file():
            return None
        if candidate not in self._cache:
            self._cache[candidate] = _thumbnail_uri(candidate)
        return self._cache[candidate]


    def overlay_uri(self, dataset: dict, name: str, entry: dict, patch) -> str | None:
        """The cluttered view of ``name`` with its occlusion drift map over it, as a thumbnail.

        ``entry`` is one pair of a result's ``drift_maps`` (per-patch ``drops``, ``height``,
        ``width``); ``None`` when the image or the stored map cannot be used.
        """
        from invariance.errors import InvarianceError
        from invariance.explain import overlay_rgb, spread_drops

        root = self.root(dataset)
        if root is None or not isinstance(entry, dict):
            return None
        folder = (root / "cluttered").resolve()
        candidate = (folder / str(name)).resolve()
        if not candidate.is_relative_to(folder) or not candidate.is_file():
            return None
        try:
            with Image.open(candidate) as image:
                image = image.convert("RGB")
                drift_map = spread_drops(entry.get("drops"), patch, image.height, image.width)
                blended = Image.fromarray(overlay_rgb(image, drift_map))
        except (OSError, ValueError, TypeError, InvarianceError, Image.DecompressionBombError):
            return None
        blended.thumbnail((THUMBNAIL_PX, THUMBNAIL_PX))
        buffer = io.BytesIO()
        blended.save(buffer, format="PNG", optimize=True)
        return plots.to_data_uri(buffer.getvalue())


def _thumbnail_uri(path: Path) -> str | None:
    try:
        with Image.open(path) as image:
            image = image.convert("RGB")
            image.thumbnail((THUMBNAIL_PX, THUMBNAIL_PX))
            buffer = io.BytesIO()
            image.save(buffer, format="PNG", optimize=True)
    except (OSError, ValueError, Image.DecompressionBombError):
        return None
    return plots.to_data_uri(buffer.getvalue())
