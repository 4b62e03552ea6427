"""One-line error messages built from exceptions raised by torch and by user code."""

from __future__ import annotations

import re

# torch.load(weights_only=True) refusing a file; its own text goes on to advise
# weights_only=False, which would run whatever the file's pickle asks for.
_REFUSED_LOAD = re.compile(r"weights[ _]only", re.IGNORECASE)
# Both "Unsupported global: GLOBAL x.y" and "unsupported GLOBAL x.y whose module x is blocked".
_UNSAFE_GLOBAL = re.compile(r"GLOBAL ([\w.]+)")
_ANSI = re.compile(r"\x1b\[[0-9;]*m")


def _is_refused_load(exc: BaseException) -> bool:
    """Whether ``exc`` is torch.load declining to unpickle something other than tensors."""
    return bool(_REFUSED_LOAD.search(str(exc)))


def _refused_load_reason(exc: BaseException) -> str:
    """What the file holds, in our words, for a load that :func:`_is_refused_load` matched."""
    found = _UNSAFE_GLOBAL.search(str(exc))
    if found:
        return f"holds a pickled {found.group(1)}, not only tensors"
    return "is not a file of tensors written by torch.save"


def _first_line(exc: BaseException) -> str:
    """The first line of an exception's message, never torch's advice to unpickle a file."""
    if _is_refused_load(exc):
        return f"torch.load refused a file that {_refused_load_reason(exc)}; invariance never unpickles other objects"
    text = _ANSI.sub("", str(exc)).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _described(exc: BaseException) -> str:
    """``TypeName: first line`` of an exception raised by code we do not control."""
    return f"{type(exc).__name__}: {_first_line(exc)}"


def _on_images(names) -> str:
    """`` for images a, b, c, d and N more`` (empty without names), to end a message."""
    if not names:
        return ""
    shown = ", ".join(names[:4]) + (f" and {len(names) - 4} more" if len(names) > 4 else "")
    return f" for images {shown}"
