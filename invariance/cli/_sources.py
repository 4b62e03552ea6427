"""Option decorators of the episode sources (``--stride``, ``--max-frames-per-episode``, ...)."""

from __future__ import annotations

import click

from ._shared import _option_group

SOURCES_HELP = (
    "Each DATA is a data folder, or a source spec [KIND:]PATH[#KEY=VALUE,...] with KIND hdf5, zarr, video or "
    "images, e.g. hdf5:demos.h5#frames=data/*/obs/front_image (see docs/sources.md)."
)


def _build(values):
    from ..sources import SourceOptions

    return SourceOptions(stride=values["stride"], max_frames_per_episode=values["max_frames_per_episode"],
                         labels=tuple(values["source_labels"]), unpaired=values["unpaired"])


def source_options(func):
    """Add the source options; the command receives ``sources=SourceOptions(...)``."""
    options = [
        ("unpaired", click.option("--unpaired", is_flag=True,
                                  help="Score the two domains as unpaired even if they share episode or file names.")),
        ("stride", click.option("--stride", type=int, default=1, show_default=True,
                                help="Keep every N-th frame of an episode.")),
        ("max_frames_per_episode", click.option("--max-frames-per-episode", type=int, default=None,
                                                help="At most N frames per episode, evenly spread.")),
        ("source_labels", click.option("--label", "source_labels", multiple=True, metavar="NAME=PATH",
                                       help="Per-frame array in the same HDF5/zarr file as a probe target "
                                            "(e.g. ee_pos=data/*/obs/ee_pos); repeat for several.")),
    ]
    return _option_group("sources", options, _build)(func)
