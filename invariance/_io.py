"""Atomic file and folder writes: a failed run never leaves a half-written output."""

from __future__ import annotations

import contextlib
import errno
import hashlib
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


def file_sha256(path) -> str:
    """SHA-256 of a file's bytes (``sha256sum`` gives the same), read in 1 MiB chunks."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


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


def _write_fully(fh, data: bytes, *, sync: bool = True) -> None:
    """Write every byte of ``data`` to the open file ``fh`` and, with ``sync``, push it to the disk.

    The one place output bytes reach a file, so a full disk (``ENOSPC``) or a failing
    volume shows up here, whatever the output.
    """
    fh.write(data)
    fh.flush()
    if sync:
        os.fsync(fh.fileno())


def _write_failed(path, exc: OSError, what: str = "choose another output path") -> InvarianceError:
    """The one-line error for an ``OSError`` met while writing ``path``."""
    reason = exc.strerror or type(exc).__name__
    hint = "free some space or " + what if exc.errno in (errno.ENOSPC, errno.EDQUOT) else what
    return InvarianceError(f"cannot write {path} ({reason}); nothing was written there; {hint}")


def _make_parent(path: Path) -> list[Path]:
    """Create the folders above ``path``; returns those created, deepest first."""
    made, folder = [], path.parent
    while not folder.exists() and folder != folder.parent:
        made.append(folder)
        folder = folder.parent
    if not folder.is_dir():
        raise InvarianceError(f"cannot write {path}: {folder} is a file, not a folder; choose an output path "
                              "inside a writable folder")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise _write_failed(path, exc, "choose an output path inside a writable folder") from None
    return made


def _remove_empty(folders) -> None:
    for folder in folders:
        with contextlib.suppress(OSError):
            folder.rmdir()


def _staged(path: Path, data: bytes) -> Path:
    """``data`` in a new temporary file beside ``path`` (0666 less the umask), not yet in place."""
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)  # reopened by name, so the open file names the path it writes (in messages too)
    try:
        os.chmod(tmp, 0o666 & ~_umask())
        with open(tmp, "wb") as fh:
            _write_fully(fh, data)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    return Path(tmp)


def _target(path) -> Path:
    """Where writing ``path`` lands: a symbolic link is written through to its target."""
    path = Path(path)
    return path.resolve() if path.is_symlink() else path


def _write_in_place(path: Path, data: bytes) -> None:
    try:
        with open(path, "wb") as fh:
            _write_fully(fh, data, sync=False)  # a device or FIFO: nothing to sync
    except OSError as exc:
        raise _write_failed(path, exc) from None


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder and a rename.

    The file gets the usual permissions for new files (0666 less the umask), not the
    owner-only mode of temporary files. A symbolic link is written through (the link stays
    and its target gets the data); a device node or FIFO (``/dev/stdout``, ``/dev/null``)
    is written in place, since renaming over it would replace it with a regular file.

    Raises
    ------
    InvarianceError
        The file cannot be written (a full disk, a read-only folder); one line naming
        ``path``, and neither the file nor a temporary file is left behind.
    """
    return write_outputs_together([(path, data)])[0]


def atomic_write_text(path: str | os.PathLike, text: str) -> Path:
    """:func:`atomic_write_bytes` of ``text`` encoded as UTF-8."""
    return atomic_write_bytes(path, text.encode("utf-8"))


def atomic_write_json(path: str | os.PathLike, data) -> Path:
    """:func:`atomic_write_bytes` of ``data`` as indented JSON (see :func:`dumps_json`)."""
    return atomic_write_text(path, dumps_json(data) + "\n")


def _as_bytes(content) -> bytes:
    return content.encode("utf-8") if isinstance(content, str) else bytes(content)


def write_outputs_together(outputs) -> list[Path]:
    """Write several output files so that either all of them reach their paths or none does.

    Every file is first written in full to a temporary file in its own folder; only when
    all of them were written are they renamed into place, one after the other (a rename
    needs no space and does not fail half-way). A failure before that point removes every
    temporary file and leaves the old outputs, if any, untouched. Device nodes and FIFOs
    (``/dev/null``) are written in place, after every regular file has been staged.

    Parameters
    ----------
    outputs : sequence of (path, content)
        ``content`` is ``bytes`` or ``str`` (written as UTF-8), rendered by the caller
        before this call so that a failing renderer leaves nothing behind.

    Returns
    -------
    list of Path
        Where each output was written (a symbolic link's target), in order.

    Raises
    ------
    InvarianceError
        An output cannot be written (full disk, read-only folder, a file in the way);
        one line naming it. Nothing of this call is left behind.
    """
    staged, in_place, made, written = [], [], [], []
    try:
        for path, content in outputs:
            target, data = _target(path), _as_bytes(content)
            written.append(target)
            if _is_special(target):
                in_place.append((target, data))
                continue
            if target.is_dir():  # found now, not at the rename, after other outputs had landed
                raise InvarianceError(f"cannot write {target}: it is a folder; choose a file path")
            made += _make_parent(target)
            try:
                staged.append((_staged(target, data), target))
            except OSError as exc:
                raise _write_failed(target, exc) from None
        for tmp, target in staged:
            try:
                os.replace(tmp, target)
            except OSError as exc:
                raise _write_failed(target, exc) from None
        staged = []
    except BaseException:
        for tmp, _ in staged:
            with contextlib.suppress(OSError):
                os.unlink(tmp)
        _remove_empty(made)
        raise
    for target, data in in_place:
        _write_in_place(target, data)
    return written


@contextlib.contextmanager
def atomic_directory(path: str | os.PathLike) -> Iterator[Path]:
    """Build a folder in a temporary sibling and move it into place only on success.

    If ``path`` exists and is empty it is replaced; if it exists and is not empty the
    caller must have refused earlier (we never merge into a user's folder). The folder
    gets the usual permissions of new folders (0777 less the umask), not the owner-only
    mode of temporary folders.

    Raises
    ------
    InvarianceError
        The folder cannot be made or written (a file in the way, a full disk: an
        ``OSError`` inside the block is turned into this one-line error), or another run
        filled ``path`` meanwhile. The temporary folder is always removed.
    """
    path = Path(path)
    fix = "choose a new or empty folder"
    _make_parent(path)
    try:
        tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".partial", dir=path.parent))
        os.chmod(tmp, 0o777 & ~_umask())
    except OSError as exc:
        raise _write_failed(path, exc, fix) from None
    try:
        try:
            yield tmp
        except OSError as exc:
            raise _write_failed(path, exc, fix) from None
        _move_into_place(tmp, path)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def _move_into_place(tmp: Path, path: Path) -> None:
    try:
        if path.is_dir() and not path.is_symlink():
            path.rmdir()  # only succeeds when empty
        os.replace(tmp, path)
    except OSError as exc:
        if path.exists() and (not path.is_dir() or any(path.iterdir())):
            raise InvarianceError(f"output folder {path} was filled by something else while this run wrote it "
                                  "(a second run?); this run kept nothing: choose a new or empty folder") from None
        raise _write_failed(path, exc, "choose a new or empty folder") from None


def write_new_file(path: str | os.PathLike, data: bytes) -> None:
    """Create ``path`` (which must not exist) holding ``data``, inside a folder being built.

    For files inside :func:`atomic_directory`'s temporary folder, whose move into place
    makes them visible all at once. An ``OSError`` propagates to that block.
    """
    with open(path, "xb") as fh:
        _write_fully(fh, data, sync=False)  # thousands of small files: a sync each would dominate


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
