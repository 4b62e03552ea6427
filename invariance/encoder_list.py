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
            data = tomllib.load(fh)
    except OSError as exc:
        raise InvarianceError(f"cannot read {path}: {exc.strerror}; check the encoder list path") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InvarianceError(f"{path} is not valid TOML ({exc}); fix the file") from None
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
    item = dict(entry)
    if item.get("weights"):
        item["weights"] = path.parent / str(item["weights"])
    try:
        return EncoderEntry(**item)
    except InvalidParameter as exc:
        raise InvarianceError(f"{path}: encoder {index}: {exc}; fix the file") from None
