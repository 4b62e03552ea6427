"""Progress of long work: one small interface for every module, never tied to the CLI.

Library functions take ``progress``: ``True`` (a tqdm bar and notes on stderr), ``False``
(silent), a callable (receives every note as a string, bars are silent) or a
:class:`Reporter`. They turn it into a :class:`Reporter` with :func:`as_reporter`.
"""

from __future__ import annotations

import sys
from typing import Callable

from tqdm.auto import tqdm


class Reporter:
    """Where a run's progress goes.

    Parameters
    ----------
    enabled : bool, default=True
        Draw bars and write notes on stderr.
    callback : callable, optional
        Receives each note (a string) instead of stderr; bars are then silent.
    """

    def __init__(self, enabled: bool = True, callback: Callable[[str], None] | None = None):
        self.enabled = bool(enabled)
        self.callback = callback

    def bar(self, total: int, label: str):
        """A progress bar over ``total`` items (a context manager with ``update(n)``)."""
        show = self.enabled and self.callback is None
        return tqdm(total=total, desc=label, file=sys.stderr, disable=not show, leave=False,
                    dynamic_ncols=True, mininterval=0.5)

    def note(self, message: str) -> None:
        """One line of progress (a training step, a stage starting)."""
        if self.callback is not None:
            self.callback(message)
        elif self.enabled:
            tqdm.write(message, file=sys.stderr)


def as_reporter(progress) -> Reporter:
    """A :class:`Reporter` from ``True``/``False``, a callable or a Reporter."""
    if isinstance(progress, Reporter):
        return progress
    if callable(progress):
        return Reporter(True, progress)
    return Reporter(bool(progress))
