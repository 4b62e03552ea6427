"""Option decorators and argument checks of the episode sources and unpaired domains."""

from __future__ import annotations

from pathlib import Path

import click

from ._shared import _option_group

SOURCES_HELP = (
    "Each DATA is a data folder, or a source spec [KIND:]PATH[#KEY=VALUE,...] with KIND hdf5, zarr, video or "
    "images, e.g. hdf5:demos.h5#frames=data/*/obs/front_image (see docs/sources.md)."
)

# The source options that only mean something for two domains (a paired data folder uses every pair).
_DOMAIN_FLAGS = "--stride, --max-frames-per-episode and --label"


def _build(values):
    from ..sources import SourceOptions

    return SourceOptions(stride=values["stride"], max_frames_per_episode=values["max_frames_per_episode"],
                         labels=tuple(values["source_labels"]), unpaired=values["unpaired"])


def source_options(func):
    """Add the source options; the command receives ``sources=SourceOptions(...)``."""
    options = [
        ("unpaired", click.option("--unpaired", is_flag=True,
                                  help="Score the two domains as unpaired (no scene in common: sim vs real, bench "
                                       "vs site) even if they share episode or file names; with one DATA folder, "
                                       "its clean/ and cluttered/ images. Drift, pair retrieval and CKA need pairs "
                                       "and are left out.")),
        ("stride", click.option("--stride", type=int, default=1, show_default=True,
                                help="Keep every N-th frame of an episode (two domains only).")),
        ("max_frames_per_episode", click.option("--max-frames-per-episode", type=int, default=None,
                                                help="At most N frames per episode, evenly spread (two domains "
                                                     "only).")),
        ("source_labels", click.option("--label", "source_labels", multiple=True, metavar="NAME=PATH",
                                       help="Per-frame array in the same HDF5/zarr file as a probe target "
                                            "(e.g. ee_pos=data/*/obs/ee_pos); repeat for several. Image folders "
                                            "take labels from labels.csv.")),
    ]
    return _option_group("sources", options, _build)(func)


def _names_a_source(value) -> bool:
    from ..sources import KINDS

    return str(value).partition(":")[0] in KINDS or "#" in str(value)


def _has_views(folder: Path) -> bool:
    return (folder / "clean").is_dir() and (folder / "cluttered").is_dir()


def domain_arguments(data, sources) -> tuple:
    """``(DATA, DATA_B)`` from a command's DATA arguments (``DATA_B`` None for one DATA).

    Usage errors (exit 2) say what to give instead: more than two arguments, one source
    spec alone, ``--unpaired`` with one DATA that has no clean/ and cluttered/, and the
    frame options without two domains.
    """
    if len(data) > 2:
        raise click.UsageError(f"give one data folder or two domains (DATA_A DATA_B); got {len(data)} arguments")
    if len(data) == 2:
        return data[0], data[1]
    folder = data[0]
    if _names_a_source(folder):
        raise click.UsageError(f"{folder} names one source; give two domains (DATA_A DATA_B): a source is "
                               f"scored against another source")
    if sources.unpaired and not _has_views(Path(folder)):
        raise click.UsageError(f"--unpaired with one DATA compares its clean/ and cluttered/ images; {folder} has "
                               f"no clean/ and cluttered/ folders: give a data folder or two domains (DATA_A DATA_B)")
    if frame_flags_given(sources) and not (sources.unpaired or unpaired_layout(folder)):
        raise click.UsageError(f"{_DOMAIN_FLAGS} apply to two domains (DATA_A DATA_B, or one folder with "
                               f"--unpaired); a paired data folder scores every pair")
    return folder, None


def frame_flags_given(sources) -> bool:
    """Whether a frame option (--stride, --max-frames-per-episode, --label) was given; --unpaired is not one."""
    return sources.stride != 1 or sources.max_frames_per_episode is not None or bool(sources.labels)


def domain_flags_given(sources) -> bool:
    """Whether any source option was given (``--unpaired`` or a frame option)."""
    return sources.unpaired or frame_flags_given(sources)


def unpaired_layout(folder) -> bool:
    """Whether one DATA folder's clean/ and cluttered/ share no file name (two unpaired domains)."""
    from ..data import unpaired_folder

    folder = Path(folder)
    return folder.is_dir() and unpaired_folder(folder) is not None


def compared_domains(data_a, data_b, sources):
    """The two domains a command scores, as source specs, or ``None`` for one paired data folder.

    Two DATA arguments are the domains; one folder scored with ``--unpaired``, or whose
    clean/ and cluttered/ share no name, gives ``images:DATA/clean`` and ``images:DATA/cluttered``.
    """
    if data_b is not None:
        return data_a, data_b
    if sources.unpaired or unpaired_layout(data_a):
        return f"images:{Path(data_a) / 'clean'}", f"images:{Path(data_a) / 'cluttered'}"
    return None


def source_inputs(specs) -> list[Path]:
    """Files two domains read, which no output may overwrite: each spec's path and an image
    folder's labels.csv files (its own, and its data folder's for clean/ and cluttered/)."""
    from ..data import LABELS_FILE
    from ..sources import parse_spec

    out = []
    for spec in specs:
        parsed = parse_spec(str(spec))
        out.append(parsed.path)
        if parsed.kind == "images":
            out += [parsed.path / LABELS_FILE, parsed.path.parent / LABELS_FILE]
    return out


def check_domains(data_a, data_b, sources, folds) -> str:
    """Open both domains (no frame is read) and refuse, before any encoder runs, what would
    fail for every encoder: episodes in one domain only, too few rows or groups for the
    unpaired tests, unreadable labels. Returns ``"paired"`` or ``"unpaired"``."""
    from ..scoring import check_unpaired_size
    from ..sources import expected_frames, match_domains, open_source

    domains = match_domains(open_source(str(data_a), sources), open_source(str(data_b), sources), sources)
    for source in (domains.a, domains.b):  # an episode shorter than the stride fails now, not after loading
        for episode in source.episodes:
            if episode.n_frames is not None:
                sources.frame_indices(episode.n_frames, _episode_label(source, episode))
    if domains.mode == "unpaired":
        for label, source in (("A", domains.a), ("B", domains.b)):
            groups = {episode.group for episode in source.episodes}
            check_unpaired_size(label, expected_frames(source, sources), len(groups), folds)
    return domains.mode


def _episode_label(source, episode) -> str:
    # an image folder's episodes are single images: say so, since --stride then keeps nothing
    if getattr(source, "kind", None) == "images":
        return f"{episode.name} (an image in {source.path}: one frame)"
    return episode.name
