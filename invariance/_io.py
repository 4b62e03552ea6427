"""Atomic file and folder writes: a failed run never leaves a half-written output."""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import tempfile
from pathlib import Path
from typing import Iterator

import numpy as np


def _json_default(obj):
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def dumps_json(data) -> str:
    """JSON text with numpy scalars converted; NaN and inf are refused (never valid JSON)."""
    return json.dumps(data, indent=2, sort_keys=False, default=_json_default, allow_nan=False)


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder and a rename.

    The file gets the usual permissions for new files (0666 less the umask), not the
    owner-only mode of temporary files.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.fchmod(fd, 0o666 & ~_umask())
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    return path


def atomic_write_text(path: str | os.PathLike, text: str) -> Path:
    return atomic_write_bytes(path, text.encode("utf-8"))


def atomic_write_json(path: str | os.PathLike, data) -> Path:
    return atomic_write_text(path, dumps_json(data) + "\n")


@contextlib.contextmanager
def atomic_directory(path: str | os.PathLike) -> Iterator[Path]:
    """Build a folder in a temporary sibling and move it into place only on success.

    If ``path`` exists and is empty it is replaced; if it exists and is not empty the
    caller must have refused earlier (we never merge into a user's folder).
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".partial", dir=path.parent))
    try:
        yield tmp
        if path.exists():
            path.rmdir()  # only succeeds when empty
        os.replace(tmp, path)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
