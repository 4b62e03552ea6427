"""What was asked for, mapped to the feature-cache entries it produced: a repeat needs no encoder.

The feature cache (:mod:`invariance.encoders.cache`) is keyed by the encoder's *state*
(a hash of every parameter), so finding an entry needs the encoder built first: importing
torch and torchvision and building the model cost most of a warm re-score. This index
records, for a request (spec, files, options, images, layer), which cache entry the loaded
encoder produced and how the encoder described itself. A repeat of the same request is
then served from the cache without importing torch at all.

A request only has an index record when everything that decides its features can be
checked without running code: the spec string, the SHA-256 of every file it names (weights,
TorchScript file, checkpoint, a ``python:`` file), the code of this package, the versions of
torch and torchvision (random initialisation depends on them), the image size and the
trusted-code names (so a request that needs ``--trust-code`` is never served to a run that
did not pass it). ``python:MODULE:CALLABLE`` specs outside this package always load, since
which file a module name resolves to can depend on code that runs at import.

Records live in ``<cache_dir>/requests/<key>.json``; an unreadable or inconsistent record
is ignored (the encoder is then loaded as usual) and rewritten.
"""

from __future__ import annotations

import hashlib
import json
from importlib import metadata
from pathlib import Path

from . import __version__
from ._io import atomic_write_json, file_sha256

RECORD_FORMAT = "invariance.request/1"
_PACKAGE = Path(__file__).resolve().parent
_PACKAGE_CODE_SHA256: list[str] = []


def request_identity(spec: str, *, weights=None, image_size=None, trusted_code=()) -> dict | None:
    """Everything that decides an encoder's features, read without loading it.

    Parameters
    ----------
    spec : str
        Encoder spec (see :mod:`invariance.encoders`).
    weights : path, optional
        Local state dict for a ``torchvision:`` spec.
    image_size : int, optional
        The preprocessing override.
    trusted_code : sequence of str
        ``python:`` specs the user trusts (``--trust-code``).

    Returns
    -------
    dict or None
        ``None`` when the spec's identity cannot be known without running code, or a
        file it names cannot be read (the normal load then reports the problem).
    """
    files = _named_files(spec)
    if files is None:
        return None
    if weights is not None:
        files.append(Path(weights))
    try:
        hashes = [file_sha256(path) for path in files]
    except OSError:
        return None
    return {
        "format": RECORD_FORMAT,
        "spec": spec,
        "files_sha256": hashes,
        "image_size": image_size,
        "trusted_code": sorted(str(t) for t in trusted_code),
        "invariance": __version__,
        "encoder_code": package_code_sha256(),
        "torch": _version("torch"),
        "torchvision": _version("torchvision"),
    }


def recall(cache_dir, identity: dict | None, pairs, layers) -> tuple[dict, dict] | None:
    """Cached features of every layer of a request, or ``None`` unless all of them are there.

    Parameters
    ----------
    cache_dir : path or None
    identity : dict or None
        From :func:`request_identity`.
    pairs : invariance.data.PairSet
    layers : list of str

    Returns
    -------
    (features, encoder_description) or None
        ``features`` maps each layer to ``(clean, cluttered)``; the description is the
        loaded encoder's ``describe()`` recorded when the features were extracted.
    """
    if cache_dir is None or identity is None:
        return None
    from .encoders import cache  # numpy only; the encoders package imports torch lazily

    features, description = {}, None
    for layer in layers:
        record = _read_record(_record_path(cache_dir, identity, pairs, layer))
        if record is None:
            return None
        hit = cache.load(cache_dir, record["entry"], rows=len(pairs), content_hash=pairs.content_hash())
        if hit is None:
            return None
        features[layer], description = hit, record["encoder"]
    return features, description


def remember(cache_dir, identity: dict | None, pairs, encoder, layers) -> None:
    """Record which cache entries ``encoder`` produced for this request (after extraction).

    Nothing is recorded without a cache folder or an identity, or when writing fails (the
    index, like the cache, only saves time).
    """
    if cache_dir is None or identity is None:
        return
    from .encoders import cache

    keys = cache.layer_keys(pairs, encoder, list(layers))
    for layer, key in keys.items():
        if not cache.entry_path(cache_dir, key).is_file():
            continue  # the cache could not store it: nothing to point at
        record = {"format": RECORD_FORMAT, "entry": key, "encoder": encoder.describe()}
        try:
            atomic_write_json(_record_path(cache_dir, identity, pairs, layer), record)
        except Exception:  # noqa: BLE001 - a full or read-only cache volume is not an error
            return


def _record_path(cache_dir, identity: dict, pairs, layer: str) -> Path:
    text = json.dumps({**identity, "content_hash": pairs.content_hash(), "layer": layer},
                      sort_keys=True, separators=(",", ":"), default=str)
    return Path(cache_dir) / "requests" / f"{hashlib.sha256(text.encode('utf-8')).hexdigest()}.json"


def _read_record(path: Path) -> dict | None:
    try:
        if path.stat().st_size > 1 << 20:  # a record is a few hundred bytes
            return None
        record = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    ok = (isinstance(record, dict) and record.get("format") == RECORD_FORMAT
          and isinstance(record.get("entry"), str) and len(record["entry"]) == 64
          and all(c in "0123456789abcdef" for c in record["entry"]) and isinstance(record.get("encoder"), dict))
    return record if ok else None


def _named_files(spec: str) -> list[Path] | None:
    """The files whose bytes decide the spec's encoder, or ``None`` when code decides it."""
    kind, _, rest = spec.partition(":")
    if kind == "torchvision":
        return []  # architecture and hub weights are named by the spec; versions are recorded
    if kind in ("torchscript", "checkpoint"):
        return [Path(rest)]
    if kind == "python":
        target = rest.rsplit(":", 1)[0]
        if target.endswith(".py"):
            return [Path(target)]
        if target == "invariance" or target.startswith("invariance."):
            return []  # this package's own builders: covered by the package code hash
    return None


def package_code_sha256() -> str:
    """SHA-256 over this package's sources, computed once per process."""
    if not _PACKAGE_CODE_SHA256:
        digest = hashlib.sha256()
        for path in sorted(_PACKAGE.rglob("*.py")):
            digest.update(str(path.relative_to(_PACKAGE)).encode("utf-8") + b"\0")
            digest.update(path.read_bytes())
        for path in sorted((_PACKAGE / "weights").glob("*.pt")):
            digest.update(path.name.encode("utf-8") + b"\0" + file_sha256(path).encode("ascii"))
        _PACKAGE_CODE_SHA256.append(digest.hexdigest())
    return _PACKAGE_CODE_SHA256[0]


def _version(package: str) -> str | None:
    try:
        return metadata.version(package)
    except metadata.PackageNotFoundError:
        return None
