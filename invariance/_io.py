"""Atomic file and folder writes: a failed run never leaves a half-written output."""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import stat
import tempfile
from pathlib import Path
from typing import Iterator

import numpy as np

from .errors import InvarianceError


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


def _is_special(path: Path) -> bool:
    """A device node, FIFO or socket: written in place, never replaced by a regular file."""
    try:
        mode = os.stat(path).st_mode
    except OSError:
        return False
    return stat.S_ISCHR(mode) or stat.S_ISBLK(mode) or stat.S_ISFIFO(mode) or stat.S_ISSOCK(mode)


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder and a rename.

    The file gets the usual permissions for new files (0666 less the umask), not the
    owner-only mode of temporary files. A symbolic link is written through (the link stays
    and its target gets the data); a device node or FIFO (``/dev/stdout``, ``/dev/null``)
    is written in place, since renaming over it would replace it with a regular file.
    """
    path = Path(path)
    if path.is_symlink():
        path = path.resolve()
    if _is_special(path):
        with open(path, "wb") as fh:
            fh.write(data)
        return path
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


def check_writable(path: str | os.PathLike) -> Path:
    """Fail early when the report cannot be written to ``path``.

    Rendering embeds every figure and takes a while; a bad ``--out`` should fail before
    that work, not after it.

    Parameters
    ----------
    path : path-like
        The report file to be written.

    Returns
    -------
    Path
        ``path`` as a :class:`~pathlib.Path`.

    Raises
    ------
    InvarianceError
        When ``path`` is a folder, or its folder cannot be created or written to.
    """
    path = Path(path)
    if path.is_dir():
        raise InvarianceError(f"{path}: is a folder; pass a file name such as {path / 'report.html'}")
    if _is_special(path):
        if not os.access(path, os.W_OK):
            raise InvarianceError(f"{path}: cannot write to it; choose another output path")
        return path
    if path.is_symlink():
        path = path.resolve()
    folder = path.parent
    ancestor = folder
    while not ancestor.exists() and ancestor != ancestor.parent:
        ancestor = ancestor.parent
    if not ancestor.is_dir():
        raise InvarianceError(f"{path}: {ancestor} is not a folder; choose an output path inside a writable folder")
    if ancestor == folder:
        _probe_write(folder, path)
    elif not os.access(ancestor, os.W_OK | os.X_OK):
        raise InvarianceError(f"{path}: cannot create folder under {ancestor}; choose an output path inside a writable folder")
    if path.exists() and not os.access(path, os.W_OK):
        raise InvarianceError(f"{path}: file is read-only; choose another output path or make it writable")
    return path


def _probe_write(folder: Path, path: Path) -> None:
    # os.access is not enough: it says yes to root on a read-only file system.
    try:
        fd, probe = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".check", dir=folder)
    except OSError as exc:
        raise InvarianceError(
            f"{path}: cannot write in {folder} ({exc.strerror}); choose an output path inside a writable folder"
        ) from None
    os.close(fd)
    os.unlink(probe)


def check_distinct_outputs(outputs: dict, inputs=()) -> None:
    """Refuse outputs that name the same file, or a file the run reads.

    Parameters
    ----------
    outputs : dict of str to path or None
        Output name (for the message: ``json_path``, ``out``) to its path; ``None`` skipped.
    inputs : iterable of path
        Files the run reads (labels, weights, features, result files, the encoder list).

    Raises
    ------
    InvarianceError
        Two outputs are one file, or an output is an input (it would be destroyed).
    """
    def key(p):
        p = Path(p)
        return p.resolve() if not _is_special(p) else None

    seen = {}
    for name, path in outputs.items():
        if path is None or key(path) is None:
            continue
        if key(path) in seen:
            raise InvarianceError(f"{path}: both {seen[key(path)]} and {name} would write this file; give each "
                                  "output its own path")
        seen[key(path)] = name
    for path in inputs:
        if path is not None and Path(path).exists() and key(path) in seen:
            raise InvarianceError(f"{path}: is read by this run and would be overwritten by {seen[key(path)]}; "
                                  "choose another output path")
