"""On-disk cache of extracted features, one ``.npz`` file per (encoder, layer, images).

An entry is ``<cache_dir>/<key>.npz`` holding the ``clean`` and ``cluttered`` float32
matrices and a small JSON header (format, key, spec, layer, shapes, content hash and a
SHA-256 checksum of the two arrays). The key is a SHA-256 over everything that changes the
features, so a changed image, weight, layer or preprocessing is a different file; an entry
whose header, shapes or checksum do not match is reported, deleted and rebuilt.
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import json
import warnings
import zipfile
from pathlib import Path

import numpy as np

from invariance._io import atomic_write_bytes
from invariance.errors import InvarianceError

FORMAT = "invariance.features/1"

# Cache folders whose write already failed in this process: the cache only saves time, so
# a full or read-only volume is said once and the run goes on without it.
_UNWRITABLE: set[str] = set()


def cache_key(parts: dict) -> str:
    """SHA-256 of ``parts`` written as canonical JSON (sorted keys, no spaces).

    Parameters
    ----------
    parts : dict
        Everything that changes the features; values that JSON cannot hold are written
        with ``str``.

    Returns
    -------
    str
        64 hexadecimal digits.
    """
    text = json.dumps(parts, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def entry_path(cache_dir, key: str) -> Path:
    """Where the entry of ``key`` lives in ``cache_dir``."""
    return Path(cache_dir) / f"{key}.npz"


def array_checksum(clean: np.ndarray, cluttered: np.ndarray) -> str:
    """SHA-256 over dtype, shape and bytes of both matrices (detects bit rot and edits).

    Parameters
    ----------
    clean, cluttered : numpy.ndarray

    Returns
    -------
    str
        64 hexadecimal digits.
    """
    digest = hashlib.sha256()
    for arr in (clean, cluttered):
        arr = np.ascontiguousarray(arr)
        digest.update(f"{arr.dtype.str}{arr.shape}".encode("ascii"))
        digest.update(arr.tobytes())
    return digest.hexdigest()


def store(cache_dir, key: str, clean: np.ndarray, cluttered: np.ndarray, header: dict) -> Path | None:
    """Write one entry atomically; a cache that cannot be written is warned about once and skipped.

    Parameters
    ----------
    cache_dir : path
    key : str
        From :func:`cache_key`.
    clean, cluttered : numpy.ndarray
        (pairs, D) features, stored as float32.
    header : dict
        Where the features came from; completed with format, key, shape and checksum.

    Returns
    -------
    Path or None
        The entry written; ``None`` when the folder cannot take it (full disk, read-only,
        a file in the way): the features are still returned by the caller, only not kept.
    """
    clean = np.ascontiguousarray(clean, dtype=np.float32)
    cluttered = np.ascontiguousarray(cluttered, dtype=np.float32)
    full = dict(header)
    full.update(
        format=FORMAT,
        key=key,
        shape=list(clean.shape),
        checksum=array_checksum(clean, cluttered),
    )
    meta = np.frombuffer(json.dumps(full, sort_keys=True).encode("utf-8"), dtype=np.uint8)
    buf = io.BytesIO()
    np.savez(buf, clean=clean, cluttered=cluttered, header=meta)
    try:
        return atomic_write_bytes(entry_path(cache_dir, key), buf.getvalue())
    except (InvarianceError, OSError) as exc:
        if str(cache_dir) not in _UNWRITABLE:
            _UNWRITABLE.add(str(cache_dir))
            cause = exc if isinstance(exc, OSError) else exc.__context__
            reason = getattr(cause, "strerror", None) or str(exc)
            warnings.warn(f"feature cache {cache_dir} cannot be written ({reason}); the run goes on without "
                          "keeping features; free some space or pass another cache_dir", RuntimeWarning, stacklevel=2)
        return None


def load(cache_dir, key: str, *, rows: int, content_hash: str):
    """The cached ``(clean, cluttered)`` for ``key``, or ``None`` when absent or unusable.

    A present entry that cannot be read, belongs to another key or image set, has the
    wrong number of rows or fails its checksum is deleted with a warning, so the caller
    extracts again and writes a fresh one.

    Parameters
    ----------
    cache_dir : path
    key : str
    rows : int
        Number of pairs the entry must hold.
    content_hash : str
        The image set's ``content_hash()`` the entry must have been written for.

    Returns
    -------
    tuple of numpy.ndarray or None
    """
    path = entry_path(cache_dir, key)
    if not path.is_file():
        return None
    try:
        clean, cluttered, header = _read(path)
    except (OSError, ValueError, KeyError, zipfile.BadZipFile, EOFError, json.JSONDecodeError) as exc:
        return _discard(path, f"unreadable ({type(exc).__name__})")
    problem = _problem(header, clean, cluttered, key=key, rows=rows, content_hash=content_hash)
    if problem:
        return _discard(path, problem)
    return clean, cluttered


def _read(path: Path):
    with np.load(path, allow_pickle=False) as npz:
        clean = np.array(npz["clean"])
        cluttered = np.array(npz["cluttered"])
        header = json.loads(bytes(npz["header"]).decode("utf-8"))
    if not isinstance(header, dict):
        raise ValueError("header is not an object")
    return clean, cluttered, header


def _problem(header: dict, clean, cluttered, *, key: str, rows: int, content_hash: str) -> str | None:
    # Checked in order of cheapness; the checksum reads every byte.
    if header.get("format") != FORMAT:
        return f"of another format ({header.get('format')!r})"
    if header.get("key") != key or header.get("content_hash") != content_hash:
        return "stale (written for other images or another encoder)"
    if clean.shape != cluttered.shape or clean.ndim != 2 or clean.shape[0] != rows:
        return f"of the wrong shape ({clean.shape} and {cluttered.shape} for {rows} pairs)"
    if list(clean.shape) != header.get("shape") or clean.dtype != np.float32:
        return "inconsistent with its header"
    if array_checksum(clean, cluttered) != header.get("checksum"):
        return "corrupt (checksum mismatch)"
    return None


def _discard(path: Path, reason: str):
    warnings.warn(
        f"feature cache entry {path} is {reason}; deleting it and extracting again",
        RuntimeWarning,
        stacklevel=3,
    )
    with contextlib.suppress(FileNotFoundError):
        path.unlink()
    return None


def layer_keys(pairs, encoder, layers: list[str]) -> dict[str, str]:
    """The cache key of each layer of ``encoder`` on ``pairs``.

    Parameters
    ----------
    pairs : invariance.data.PairSet
    encoder : invariance.encoders.Encoder
    layers : list of str

    Returns
    -------
    dict
        ``{layer: key}``; the key covers spec, weights file, module state, code,
        preprocessing, image content, cache format and layer.
    """
    from .weights import _state_sha256  # torch: imported only when an encoder is at hand

    # The module state is hashed on every call: a module trained in place (alignment) must
    # never be served the features of its earlier weights.
    base = {
        "spec": encoder.spec,
        "weights_sha256": encoder.weights_sha256,
        "state_sha256": _state_sha256(encoder.module),
        "code_sha256": encoder.code_sha256,
        "preprocess": encoder.preprocess.describe(),
        "content_hash": pairs.content_hash(),
        "format": FORMAT,
    }
    return {layer: cache_key({**base, "layer": layer}) for layer in layers}


def layer_header(pairs, encoder, layer: str) -> dict:
    """What an entry's header says about where its features came from."""
    return {"spec": encoder.spec, "layer": layer, "content_hash": pairs.content_hash(), "pairs": len(pairs)}
