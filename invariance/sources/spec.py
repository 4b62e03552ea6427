"""The source spec: one string naming where a domain's frames are and how to read them.

    [KIND:]PATH[#KEY=VALUE[,KEY=VALUE...]]

KIND is ``hdf5``, ``zarr``, ``video`` or ``images``; without it the kind follows from the
path (an ``.h5``/``.hdf5`` file or a folder of them, a ``.zarr`` folder or one holding
zarr metadata, a video file or a folder of videos, else a folder of images). KEYs:
``frames`` (hdf5: a dataset path pattern, required; zarr: the frames array, required) and
``ends`` (zarr: the episode-end array, default ``meta/episode_ends``) and ``fps`` (video:
frames kept per second of video, instead of ``--stride``). See docs/sources.md.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from invariance.errors import InvalidParameter

from . import hdf5, video

KINDS = ("hdf5", "zarr", "video", "images")
_KEYS = {"hdf5": {"frames"}, "zarr": {"frames", "ends"}, "video": {"fps"}, "images": set()}
_REQUIRED = {"hdf5": {"frames"}, "zarr": {"frames"}, "video": set(), "images": set()}


@dataclass(frozen=True)
class SourceSpec:
    """A parsed spec: ``kind``, ``path`` and ``keys`` (a dict of the KEY=VALUE settings)."""

    kind: str
    path: Path
    keys: tuple

    @property
    def settings(self) -> dict:
        return dict(self.keys)

    def __str__(self):
        tail = ",".join(f"{k}={v}" for k, v in self.keys)
        return f"{self.kind}:{self.path}" + (f"#{tail}" if tail else "")


def _infer_kind(path: Path) -> str:
    try:
        return _kind_from_disk(path)
    except OSError:  # a name too long, a folder we may not list: the reader reports it with the fix
        return "images"


def _kind_from_disk(path: Path) -> str:
    suffix = path.suffix.lower()
    if suffix in hdf5.EXTENSIONS:
        return "hdf5"
    if suffix == ".zarr" or (path.is_dir() and any((path / m).exists() for m in ("zarr.json", ".zgroup"))):
        return "zarr"
    if suffix in video.EXTENSIONS:
        return "video"
    if path.is_dir():
        children = {p.suffix.lower() for p in path.iterdir() if p.is_file()}
        if children & set(hdf5.EXTENSIONS):
            return "hdf5"
        if children & set(video.EXTENSIONS):
            return "video"
    return "images"


def _settings(text: str, spec: str, kind: str) -> tuple:
    out = {}
    for item in filter(None, (part.strip() for part in text.split(","))):
        key, sep, value = item.partition("=")
        if not sep or not value:
            raise InvalidParameter("source", f"source {spec!r}: {item!r} is not KEY=VALUE")
        out[key.strip()] = value.strip()
    unknown = set(out) - _KEYS[kind]
    if unknown:
        allowed = ", ".join(sorted(_KEYS[kind])) or "none"
        raise InvalidParameter("source", f"source {spec!r}: unknown setting {sorted(unknown)} for {kind} "
                                         f"(allowed: {allowed})")
    missing = _REQUIRED[kind] - set(out)
    if missing:
        raise InvalidParameter("source", f"source {spec!r}: {kind} needs {', '.join(sorted(missing))}=..., e.g. "
                                         f"{kind}:{spec.split('#')[0].split(':', 1)[-1]}#frames=data/*/obs/front_image")
    return tuple(sorted(out.items()))


def parse_spec(spec) -> SourceSpec:
    """Parse ``[KIND:]PATH[#KEY=VALUE,...]`` (see the module docstring).

    Parameters
    ----------
    spec : str or Path

    Returns
    -------
    SourceSpec
    """
    if isinstance(spec, Path):
        spec = str(spec)
    if not isinstance(spec, str) or not spec.strip():
        raise InvalidParameter("source", f"source {spec!r} is not valid; give a path, e.g. hdf5:demos.h5#frames=...")
    body, _, tail = spec.partition("#")
    kind, sep, rest = body.partition(":")
    if sep and kind in KINDS:
        path = Path(rest)
    else:
        path, kind = Path(body), _infer_kind(Path(body))
    if not str(path) or str(path) == ".":
        raise InvalidParameter("source", f"source {spec!r} names no path")
    return SourceSpec(kind, path, _settings(tail, spec, kind))
