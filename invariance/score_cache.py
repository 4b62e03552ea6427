"""Scored statistics kept beside the feature cache, so repeating a command repeats no work.

Every statistic is a deterministic function of the feature matrices, the labels, the
scoring options (seed included) and this package's code. A repeated ``score`` with the
same options therefore gets back the very numbers it computed before; any change to one
of those inputs (another ``--permutations``, an edited ``labels.csv``, new features, a new
version of the package) is a different key and the statistics are computed again.

An entry is ``<cache_dir>/scores/<key>.json`` holding the key, the scored object and a
SHA-256 of it; an entry that does not match is ignored and rewritten. The feature arrays
are hashed whole (SHA-256 runs at about 1 GB/s, so 50,000 pairs x 2,048 float32 features
cost about a second, against minutes of statistics).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
from pathlib import Path

import numpy as np

from . import __version__
from ._io import atomic_write_text, dumps_json

FORMAT = "invariance.scores/1"


def score_key(features: dict, layers, *, tasks, factors, names, groups, options) -> str:
    """SHA-256 over everything the statistics of ``layers`` depend on.

    Parameters
    ----------
    features : dict
        ``{layer: (clean, cluttered)}`` feature matrices.
    layers : list of str
    tasks, factors : dict or None
    names, groups : sequence or None
    options : ScoringOptions

    Returns
    -------
    str
    """
    from .feature_index import package_code_sha256

    digest = hashlib.sha256()
    header = {"format": FORMAT, "invariance": __version__, "code": package_code_sha256(), "layers": list(layers),
              "options": dataclasses.asdict(options)}
    digest.update(json.dumps(header, sort_keys=True, default=str).encode("utf-8"))
    for layer in layers:
        for matrix in features[layer]:
            _update(digest, np.asarray(matrix))
    for label, table in (("tasks", tasks), ("factors", factors)):
        for column in sorted(table or {}):
            digest.update(f"{label}:{column}".encode("utf-8"))
            _update(digest, np.asarray(table[column]))
    for label, values in (("names", names), ("groups", groups)):
        if values is not None:
            digest.update(label.encode("utf-8"))
            _update(digest, np.asarray(list(values)))
    return digest.hexdigest()


def load(cache_dir, key: str) -> dict | None:
    """The scored object stored under ``key``, or ``None`` (absent, unreadable or not matching)."""
    if cache_dir is None:
        return None
    path = _path(cache_dir, key)
    try:
        entry = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(entry, dict) or entry.get("format") != FORMAT or entry.get("key") != key:
        return None
    scored = entry.get("scored")
    if not isinstance(scored, dict) or entry.get("sha256") != _checksum(scored):
        return None
    return scored


def store(cache_dir, key: str, scored: dict) -> None:
    """Keep ``scored`` under ``key``; a cache that cannot be written is skipped (it only saves time)."""
    if cache_dir is None:
        return
    plain = json.loads(dumps_json(scored))  # what the result file holds: numbers, lists, dicts
    try:
        atomic_write_text(_path(cache_dir, key), json.dumps(
            {"format": FORMAT, "key": key, "sha256": _checksum(plain), "scored": plain}, allow_nan=False))
    except Exception:  # noqa: BLE001 - a full or read-only cache volume is not an error
        return


def _path(cache_dir, key: str) -> Path:
    return Path(cache_dir) / "scores" / f"{key}.json"


def _checksum(scored: dict) -> str:
    return hashlib.sha256(json.dumps(scored, sort_keys=True, allow_nan=False).encode("utf-8")).hexdigest()


def _update(digest, array: np.ndarray) -> None:
    digest.update(f"{array.dtype.str}{array.shape}".encode("utf-8"))
    if array.dtype.kind in "OUS":
        digest.update("\0".join(str(v) for v in array.ravel()).encode("utf-8"))
    else:
        digest.update(np.ascontiguousarray(array).tobytes())
