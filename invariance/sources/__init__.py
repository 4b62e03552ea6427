"""Episode sources: HDF5 files, zarr stores, videos and image folders, read lazily.

A *source* is one domain's frames, named by a spec string (:mod:`invariance.sources.spec`).
It lists its episodes without reading frames, then hands frames on one block at a time, so
memory stays bounded whatever the file size. Two sources are matched by
:func:`match_domains`: paired by (episode, frame index) when they hold the same episodes,
else unpaired. See docs/sources.md.
"""

from __future__ import annotations

from .base import Episode, Frame
from .matching import Domains, join_rows, match_domains
from .options import SourceOptions
from .spec import KINDS, SourceSpec, parse_spec

__all__ = ["Domains", "Episode", "Frame", "KINDS", "SourceOptions", "SourceSpec", "expected_frames", "iter_frames", "join_rows",
           "match_domains", "open_source", "parse_spec"]


def open_source(spec, options: SourceOptions | None = None):
    """Open a source from its spec: episodes listed and checked, no frame read yet.

    Parameters
    ----------
    spec : str, Path or SourceSpec
    options : SourceOptions, optional
        Its ``labels`` are read from the same file.

    Returns
    -------
    HDF5Source, ZarrSource, VideoSource or ImageFolderSource
        With ``episodes`` (list of :class:`Episode`), ``warnings`` and ``read``.
    """
    from invariance.errors import InvalidParameter

    options = options if options is not None else SourceOptions()
    if not isinstance(options, SourceOptions):
        raise InvalidParameter("options", f"options={options!r} is not valid; pass a SourceOptions")
    spec = spec if isinstance(spec, SourceSpec) else parse_spec(spec)
    settings = spec.settings
    if spec.kind == "hdf5":
        from .hdf5 import HDF5Source

        source = HDF5Source(spec.path, settings["frames"], options.labels)
    elif spec.kind == "zarr":
        from .zarr_store import DEFAULT_ENDS, ZarrSource

        source = ZarrSource(spec.path, settings["frames"], settings.get("ends", DEFAULT_ENDS), options.labels)
    elif spec.kind == "video":
        from .video import VideoSource

        source = VideoSource(spec.path, options.labels, settings.get("fps"))
    else:
        from .images import ImageFolderSource

        source = ImageFolderSource(spec.path, options.labels)
    source.spec = str(spec)
    return source


# Frames one source may hand on: a small file can claim billions of unwritten frames (HDF5
# and zarr return fill values for chunks never stored), so the work is bounded up front.
# Two million 224 px frames take about a day on one GPU (common practice for a bound).
MAX_FRAMES_PER_SOURCE = 2_000_000


def iter_frames(source, options: SourceOptions):
    """Every kept frame of a source, episode after episode, read lazily.

    Frame indices follow ``options`` (stride, then the per-episode cap); an episode
    shorter than the stride is an error naming it, and so is a source that would hand
    on more than :data:`MAX_FRAMES_PER_SOURCE` frames.
    """
    expected = expected_frames(source, options)
    if expected is not None and expected > MAX_FRAMES_PER_SOURCE:
        from invariance.errors import InvarianceError

        raise InvarianceError(
            f"{getattr(source, 'spec', source.path)}: {expected:,} frames would be scored, more than {MAX_FRAMES_PER_SOURCE:,}; raise "
            f"--stride or set --max-frames-per-episode"
        )
    for episode in source.episodes:
        if source.kind == "video":
            yield from source.read(episode, options)
        else:
            yield from source.read(episode, options.frame_indices(episode.n_frames, episode.name))


def expected_frames(source, options: SourceOptions):
    """Frames :func:`iter_frames` will yield, or ``None`` when a video's length is unknown."""
    total = 0
    for episode in source.episodes:
        if episode.n_frames is None:
            return None
        n = len(range(0, episode.n_frames, options.stride))
        total += n if options.max_frames_per_episode is None else min(n, options.max_frames_per_episode)
    return total
