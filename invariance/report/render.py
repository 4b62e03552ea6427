"""Render the report comparing encoders and write it as one self-contained HTML file.

One file, no network: CSS inline, every figure and thumbnail a ``data:`` URI, no script.
The markup lives in Jinja2 templates under ``templates/`` with autoescaping on, so every
piece of user-supplied text (encoder names, specs, file names, paths, error messages)
reaches the page as text; the Python side only builds a plain context.
"""

from __future__ import annotations

import functools
import os
from pathlib import Path
from typing import Iterable, Mapping, Sequence

import jinja2

from invariance._io import atomic_write_text, check_writable
from invariance.errors import InvarianceError
from invariance.report.context import page_context
from invariance.report.thumbnails import Thumbnails
from invariance.results import make_comparison

TEMPLATES = Path(__file__).with_name("templates")


@functools.lru_cache(maxsize=1)
def _environment() -> jinja2.Environment:
    # autoescape=True escapes every expression whatever the template's name; undefined
    # names fail loudly instead of leaving a silent gap in the page.
    return jinja2.Environment(loader=jinja2.FileSystemLoader(TEMPLATES), autoescape=True,
                              undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True,
                              keep_trailing_newline=True)


def write_report(path: str | os.PathLike, results: Sequence[dict], **kwargs) -> Path:
    """Render the report and write it atomically to ``path``.

    Parameters
    ----------
    path : path-like
        Output HTML file; its folder is checked for writing before rendering starts.
    results : sequence of dict
        ``invariance.result/1`` objects.
    **kwargs
        Passed to :func:`render_report`.

    Returns
    -------
    Path
        The written file.
    """
    path = check_writable(path)
    page = render_report(results, **kwargs)
    return atomic_write_text(path, page)


def render_report(results: Sequence[dict], *, failures: Iterable[dict] = (), warnings: Iterable[str] = (),
                  title: str | None = None, image_root_overrides: str | os.PathLike | Mapping | None = None,
                  tsne: bool = False) -> str:
    """The report comparing encoders, as one self-contained HTML page.

    Parameters
    ----------
    results : sequence of dict
        ``invariance.result/1`` objects, one per encoder.
    failures : iterable of dict
        ``{"spec", "name", "error"}`` for encoders that failed midway; listed in their own
        section while the others are still reported.
    warnings : iterable of str
        Run-level warnings shown near the top; data set mismatches are added automatically.
    title : str, optional
        Page title; by default it names the encoders.
    image_root_overrides : path-like or mapping, optional
        Where to find the data set images when ``dataset.path`` is not valid on this
        machine: one folder for all results, or a mapping from the stored
        ``dataset.path`` to a folder. The folder must hold ``clean/`` and ``cluttered/``.
    tsne : bool
        Also show a t-SNE view when a result carries t-SNE coordinates
        (``projection["tsne"]`` with ``clean`` and ``cluttered``); PCA is always shown.

    Returns
    -------
    str
        The HTML page. Sections carry stable ids: ``header``, ``safety-caution``,
        ``warnings`` (only when there are any), ``summary``, ``charts``, ``encoder-<i>``
        (``i`` is the position in ``results``, counted from 0; sections appear in rank
        order), ``failures``, ``data``, ``environment``, ``reading-notes`` and
        ``safety-caution-end``.

    Raises
    ------
    InvarianceError
        When there is neither a result nor a failure to report.
    """
    comparison = make_comparison(results, failures=failures, warnings=warnings)
    if not comparison["results"] and not comparison["failures"]:
        raise InvarianceError("no results to report: pass one or more RESULT.json files")
    context = page_context(comparison, title=title, thumbnails=Thumbnails(image_root_overrides), tsne=tsne)
    return _environment().get_template("report.html.j2").render(context)
