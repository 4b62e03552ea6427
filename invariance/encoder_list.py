"""Encoders listed in a TOML file, for comparing several at once.

Each ``[[encoder]]`` table has ``spec`` and optionally ``weights`` (relative to the TOML
file), ``layers``, ``name`` and ``image_size``.
"""

from __future__ import annotations

import sys
from pathlib import Path

from .errors import InvalidParameter, InvarianceError
from .options import EncoderEntry

if sys.version_info >= (3, 11):
    import tomllib
else:  # tomllib joined the standard library in 3.11; tomli is the same parser
    import tomli as tomllib

ENTRY_KEYS = ("spec", "weights", "layers", "name", "image_size")

# An encoder list is a few lines per encoder; 1 MiB is thousands of encoders, and keeps a
# wrong file (an image, a log) from being parsed into memory.
MAX_LIST_BYTES = 2**20

# What each key may hold, checked before anything is built from it.
_KINDS = {
    "weights": (lambda v: isinstance(v, str) and v != "", "a path string"),
    "layers": (lambda v: isinstance(v, list) and all(isinstance(x, str) and x for x in v), "a list of node names"),
    "name": (lambda v: isinstance(v, str), "a string"),
    "image_size": (lambda v: isinstance(v, int) and not isinstance(v, bool), "a whole number of pixels"),
}


def read_encoder_list(path) -> list[EncoderEntry]:
    """The encoders of a TOML file as :class:`~invariance.options.EncoderEntry` objects.

    Parameters
    ----------
    path : path-like
        The TOML file.

    Returns
    -------
    list of EncoderEntry

    Raises
    ------
    InvarianceError
        The file cannot be read, is not TOML, lists no encoder, or an entry is malformed.
    """
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            raw = fh.read(MAX_LIST_BYTES + 1)
        if len(raw) > MAX_LIST_BYTES:
            raise InvarianceError(f"{path} is larger than {MAX_LIST_BYTES:,} bytes, far more than an encoder list "
                                  "holds; pass the TOML file with [[encoder]] tables")
        data = tomllib.loads(raw.decode("utf-8"))
    except OSError as exc:
        raise InvarianceError(f"cannot read {path}: {exc.strerror}; check the encoder list path") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError, RecursionError, ValueError) as exc:
        reason = "nested too deeply" if isinstance(exc, RecursionError) else str(exc).splitlines()[0][:160]
        raise InvarianceError(f"{path} is not valid TOML ({reason}); fix the file") from None
    entries = data.get("encoder")
    if not isinstance(entries, list) or not entries:
        raise InvarianceError(f"{path} lists no [[encoder]] tables; add one per encoder with at least spec = \"...\"")
    return [_entry(path, i, entry) for i, entry in enumerate(entries, 1)]


def _entry(path: Path, index: int, entry) -> EncoderEntry:
    if not isinstance(entry, dict) or not isinstance(entry.get("spec"), str):
        raise InvarianceError(f"{path}: encoder {index} has no spec; write spec = \"torchvision:resnet18\" (for example)")
    unknown = set(entry) - set(ENTRY_KEYS)
    if unknown:
        raise InvarianceError(f"{path}: encoder {index} has unknown keys {sorted(unknown)}; allowed: "
                              + ", ".join(ENTRY_KEYS))
    for key, (ok, wanted) in _KINDS.items():
        if key in entry and not ok(entry[key]):
            raise InvarianceError(f"{path}: encoder {index}: {key} = {entry[key]!r:.60} is not {wanted}; fix the file")
    item = dict(entry)
    if item.get("weights"):
        item["weights"] = path.parent / str(item["weights"])
    try:
        return EncoderEntry(**item)
    except InvalidParameter as exc:
        raise InvarianceError(f"{path}: encoder {index}: {exc}; fix the file") from None
