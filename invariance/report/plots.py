"""Figures for the HTML report: small matplotlib (Agg) charts returned as PNG bytes.

Figures are built on :class:`matplotlib.figure.Figure` with an Agg canvas, never through
``pyplot``: nothing is registered in pyplot's figure manager, so no figure outlives the
call and the user's own backend choice is left alone.

Colours come from the Okabe-Ito palette (Okabe & Ito 2008, "Color Universal Design: how
to make figures and presentations that are friendly to colorblind people"), which stays
distinguishable under the common colour-vision deficiencies; clean and cluttered also
differ by marker shape so that the projection reads in grey print.
"""

from __future__ import annotations

import base64
import io
import textwrap
from typing import Sequence

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from PIL import Image

# Okabe & Ito (2008), "Color Universal Design", the eight-colour set.
CLEAN = "#0072B2"       # blue
CLUTTERED = "#D55E00"   # vermillion
SERIES = ("#0072B2", "#D55E00", "#009E73", "#E69F00", "#CC79A7", "#56B4E9", "#F0E442", "#000000")
ENCODER = "#009E73"     # bluish green: encoder bars never borrow the clean/cluttered colours
PAIRS = "#56B4E9"       # sky blue: per-pair counts
NEUTRAL = "#6b6b6b"

# The losses an alignment run logs per step, ``loss_<name>`` for each name in
# invariance.align.LOSS_NAMES (spelled out here: importing that module loads torch).
ALIGNMENT_LOSSES = ("loss_total", "loss_domain", "loss_anchor", "loss_task", "loss_paired", "loss_mean")
_LINE_STYLES = ("-", "--", "-.", ":")

ACCURACY_LABEL = "accuracy (fraction of held-out images)"
DRIFT_LABEL = "relative drift (1 = as far as a different scene)"
CKA_LABEL = "debiased CKA (1 = same, 0 = unrelated)"
MMD_LABEL = "MMD\u00b2 (each encoder's own bandwidth)"
INFORMATION_LABEL = "task skill on cluttered views (0 = baseline, 1 = perfect)"

# Font sizes in points: 8 pt is the smallest that stays legible at the report's 100 dpi
# on a laptop screen and in print (common practice).
_TICK_PT = 8
_LABEL_PT = 9
_TITLE_PT = 10
_LEGEND_PT = 8

# Small figures at ~100 dpi keep a many-encoder report a few hundred kilobytes.
_DPI = 100
_WIDE = (6.4, 3.0)
_PALETTE_COLOURS = 128


def to_data_uri(png: bytes) -> str:
    """A ``data:image/png;base64,...`` URI for PNG bytes."""
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def bar_with_intervals(labels: Sequence[str], values: Sequence[float | None],
                       intervals: Sequence[tuple[float, float] | None] | None = None, *,
                       ylabel: str, title: str, reference: float | None = None,
                       reference_label: str | None = None, ylim: tuple[float, float] | None = None,
                       annotations: Sequence[str] | None = None) -> bytes:
    """One bar per encoder with optional 95% interval error bars and a reference line.

    Parameters
    ----------
    labels : sequence of str
        Encoder names, one per bar.
    values : sequence of float or None
        Bar heights; ``None`` (not computable) leaves an empty slot marked "n/a".
    intervals : sequence of (lo, hi) or None, optional
        Interval per bar, drawn as an error bar.
    ylabel, title : str
        Axis label (with its unit) and chart title.
    reference : float, optional
        Horizontal line, e.g. chance accuracy 0.5.
    reference_label : str, optional
        Legend text for the reference line.
    ylim : (float, float), optional
        Fixed y range.
    annotations : sequence of str, optional
        Text printed above each bar (e.g. a p-value).

    Returns
    -------
    bytes
        The PNG image.
    """
    fig, ax = _figure(_bar_size(len(labels)))
    x = np.arange(len(labels))
    heights = [v if v is not None else 0.0 for v in values]
    ax.bar(x, heights, color=ENCODER, width=0.6, alpha=0.85)
    if intervals is not None:
        _error_bars(ax, x, values, intervals)
    for xi, value in zip(x, values):
        if value is None:
            ax.text(xi, 0, "n/a", ha="center", va="bottom", fontsize=8, color=NEUTRAL)
    if annotations is not None:
        top = max([h for h in heights] + [1e-12])
        for xi, height, text in zip(x, heights, annotations):
            ax.text(xi, height + 0.02 * top, text, ha="center", va="bottom", fontsize=7)
    if reference is not None:
        ax.axhline(reference, color=NEUTRAL, linestyle="--", linewidth=1, label=reference_label)
        if reference_label:
            # Above the axes, outside them: a legend inside would cover a bar.
            ax.legend(fontsize=_LEGEND_PT, loc="lower right", bbox_to_anchor=(1.0, 1.0), frameon=False,
                      borderaxespad=0.1)
    if ylim is not None:
        ax.set_ylim(*ylim)
    _categorical_axis(ax, x, labels)
    ax.set_ylabel(_wrap(ylabel, 34), fontsize=_LABEL_PT)
    ax.set_title(_plain(title), fontsize=_TITLE_PT, loc="left")
    return _png(fig)


def probe_chart(labels: Sequence[str], clean: Sequence[float | None], cluttered: Sequence[float | None], *,
                task: str, metric: str) -> bytes:
    """Probe score on held-out clean vs cluttered images, one bar pair per encoder.

    Parameters
    ----------
    labels : sequence of str
        Encoder names.
    clean, cluttered : sequence of float or None
        Probe score per encoder on clean and on cluttered images.
    task : str
        Label column the probe predicts.
    metric : str
        Score name (``accuracy`` or ``r2``), shown on the axis.

    Returns
    -------
    bytes
        The PNG image.
    """
    fig, ax = _figure(_bar_size(len(labels)))
    x = np.arange(len(labels))
    width = 0.36
    for offset, values, colour, name, hatch in ((-width / 2, clean, CLEAN, "clean", None),
                                                (width / 2, cluttered, CLUTTERED, "cluttered", "//")):
        heights = [v if v is not None else 0.0 for v in values]
        ax.bar(x + offset, heights, width=width, color=colour, label=name, hatch=hatch,
               edgecolor="white", linewidth=0.5)
    unit = ACCURACY_LABEL if metric == "accuracy" else "R\u00b2 (held-out scenes)"
    ax.set_ylabel(_wrap(unit, 34), fontsize=_LABEL_PT)
    ax.set_title(f"Probe '{_short(task, 40)}': held-out clean vs cluttered", fontsize=_TITLE_PT, loc="left")
    top = max([v for v in list(clean) + list(cluttered) if v is not None] + [0.0])
    ax.set_ylim(top=max(1.0, top) * 1.05)
    # Above the axes, outside them, so the legend never covers a bar.
    ax.legend(fontsize=_LEGEND_PT, frameon=False, loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=2,
              borderaxespad=0.1)
    _categorical_axis(ax, x, labels)
    return _png(fig)


def projection_chart(clean: np.ndarray, cluttered: np.ndarray, *, method: str = "PCA",
                     explained: Sequence[float] | None = None, links: int = 20) -> bytes:
    """Clean vs cluttered features in 2-D with thin lines joining a few pairs.

    Parameters
    ----------
    clean, cluttered : ndarray of shape (n, 2)
        Paired 2-D coordinates, row i of both arrays is scene i.
    method : str
        Projection name for the axis labels (``PCA`` or ``t-SNE``).
    explained : sequence of float, optional
        Explained variance ratio of the two components (PCA only).
    links : int
        How many pairs to join; evenly spaced over the data set so the choice is stable.

    Returns
    -------
    bytes
        The PNG image.
    """
    clean = np.asarray(clean, dtype=float).reshape(-1, 2)
    cluttered = np.asarray(cluttered, dtype=float).reshape(-1, 2)
    fig, ax = _figure((4.6, 3.6))
    n = min(len(clean), len(cluttered))
    for i in _link_indices(n, links):
        ax.plot([clean[i, 0], cluttered[i, 0]], [clean[i, 1], cluttered[i, 1]],
                color=NEUTRAL, linewidth=0.5, alpha=0.7, zorder=1)
    ax.scatter(clean[:, 0], clean[:, 1], s=10, c=CLEAN, marker="o", label="clean", zorder=2, alpha=0.8)
    ax.scatter(cluttered[:, 0], cluttered[:, 1], s=12, c=CLUTTERED, marker="^", label="cluttered",
               zorder=2, alpha=0.8)
    for axis, setter in enumerate((ax.set_xlabel, ax.set_ylabel)):
        share = ""
        if explained is not None and len(explained) > axis:
            share = f" ({100 * float(explained[axis]):.0f}% of variance)"
        setter(f"{method} {axis + 1}{share}", fontsize=8)
    ax.set_title(f"{method} of features; grey lines join {min(links, n)} pairs", fontsize=9)
    ax.legend(fontsize=7, framealpha=0.85, loc="best")
    return _png(fig)


def drift_histogram(drifts: Sequence[float], *, worst_from: float | None = None,
                    mean: float | None = None) -> bytes:
    """Histogram of per-pair relative drift, with the mean, the median and the worst-pair cut marked.

    Parameters
    ----------
    drifts : sequence of float
        Relative drift of every pair.
    worst_from : float, optional
        Smallest drift among the worst pairs shown as thumbnails.
    mean : float, optional
        The headline (mean) relative drift; by default the mean of ``drifts``.

    Returns
    -------
    bytes
        The PNG image.
    """
    values = np.asarray([d for d in drifts if d is not None and np.isfinite(d)], dtype=float)
    fig, ax = _figure(_WIDE)
    if values.size:
        ax.hist(values, bins=min(30, max(5, values.size // 4)), color=PAIRS, alpha=0.9)
        median = float(np.median(values))
        mean = float(values.mean()) if mean is None else float(mean)
        ax.axvline(mean, color="#000000", linewidth=1.4, label=f"mean {mean:.3f} (headline)")
        ax.axvline(median, color="#000000", linestyle="--", linewidth=1, label=f"median {median:.3f}")
    if worst_from is not None:
        ax.axvline(worst_from, color=CLUTTERED, linestyle="--", linewidth=1, label="worst pairs shown below")
    ax.axvline(1.0, color=NEUTRAL, linestyle=":", linewidth=1, label="as far as a different scene")
    ax.set_xlabel(DRIFT_LABEL, fontsize=_LABEL_PT)
    ax.set_ylabel("pairs (count)", fontsize=_LABEL_PT)
    ax.set_title("How far clutter moves each scene's feature", fontsize=_TITLE_PT, loc="left")
    ax.legend(fontsize=_LEGEND_PT, frameon=False, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    return _png(fig)


def line_profile(xlabels: Sequence[str], series: dict[str, Sequence[float | None]], *,
                 xlabel: str, ylabel: str, title: str, reference: float | None = None,
                 reference_label: str | None = None) -> bytes:
    """Several metrics (or factors) drawn as lines over ordered categories.

    Parameters
    ----------
    xlabels : sequence of str
        Categories in order (layers in network order, or clutter levels).
    series : dict of str to sequence of float or None
        One line per entry; ``None`` values leave a gap.
    xlabel, ylabel, title : str
        Axis labels (with units) and title.
    reference : float, optional
        Horizontal reference line (chance accuracy).
    reference_label : str, optional
        Legend text for the reference line.

    Returns
    -------
    bytes
        The PNG image.
    """
    fig, ax = _figure((6.4, 3.6))
    x = np.arange(len(xlabels))
    markers = "osD^vP*X"
    for i, (name, values) in enumerate(series.items()):
        y = np.array([v if v is not None else np.nan for v in values], dtype=float)
        ax.plot(x, y, marker=markers[i % len(markers)], markersize=4, linewidth=1.4,
                color=SERIES[i % len(SERIES)], label=_wrap(name, 30))
    if reference is not None:
        ax.axhline(reference, color=NEUTRAL, linestyle="--", linewidth=1, label=reference_label)
    ax.set_xticks(x)
    longest = max((len(line) for s in xlabels for line in str(s).split("\n")), default=0)
    rotate = 30 if (longest > 6 or len(xlabels) > 8) and "\n" not in "".join(map(str, xlabels)) else 0
    ax.set_xticklabels([_wrap(s, 18) for s in xlabels], fontsize=_TICK_PT, rotation=rotate,
                       ha="right" if rotate else "center")
    ax.set_xlabel(_wrap(xlabel, 60), fontsize=_LABEL_PT)
    ax.set_ylabel(_wrap(ylabel, 34), fontsize=_LABEL_PT)
    ax.set_title(_plain(title), fontsize=_TITLE_PT, loc="left")
    if ax.get_legend_handles_labels()[0]:
        # Right of the axes: lines near the top (CKA close to 1) and the x labels stay readable.
        ax.legend(fontsize=_LEGEND_PT, frameon=False, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    return _png(fig)


def alignment_curves(curves: dict[str, Sequence[float]]) -> bytes | None:
    """Training curves of an alignment run: domain accuracies, losses and lambda over steps.

    Parameters
    ----------
    curves : dict
        ``step`` plus any of ``discriminator_accuracy``, ``val_domain_accuracy``, the
        losses in :data:`ALIGNMENT_LOSSES` and ``lambda``; a curve whose length is not
        that of ``step`` is left out.

    Returns
    -------
    bytes or None
        The PNG image, or ``None`` when there is nothing to draw.
    """
    steps = np.asarray(curves.get("step") or [], dtype=float)
    if steps.size == 0:
        return None
    fig = Figure(figsize=(9.6, 3.2), dpi=_DPI)
    FigureCanvasAgg(fig)
    panels = (
        (("discriminator_accuracy", "val_domain_accuracy"), "domain accuracy (fraction)", 0.5, False),
        # The losses span three decades (a mean-matching term of 0.01 beside a total of 40):
        # on a linear axis all but the largest would lie flat on zero.
        (ALIGNMENT_LOSSES, "loss (training objective, log scale)", None, True),
        (("lambda",), "gradient-reversal weight \u03bb", None, False),
    )
    for i, (keys, ylabel, chance, log) in enumerate(panels):
        ax = fig.add_subplot(1, 3, i + 1)
        _style_axes(ax)
        _curve_panel(ax, steps, [(key, _curve(curves.get(key), steps.size)) for key in keys], log=log)
        if chance is not None:
            ax.axhline(chance, color=NEUTRAL, linestyle="--", linewidth=0.8, label="chance")
        ax.set_xlabel("training step", fontsize=7)
        ax.set_ylabel(ylabel, fontsize=7)
        ax.tick_params(labelsize=6)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=6, frameon=False, ncol=2 if len(keys) > 3 else 1)
    fig.tight_layout()
    return _png(fig, tight=False)


def _curve_panel(ax, steps: np.ndarray, series: list[tuple[str, np.ndarray | None]], *, log: bool) -> None:
    drawn = []
    for j, (key, values) in enumerate(series):
        if values is None:
            continue
        # Up to six lines share a panel: the line style tells them apart in grey print.
        ax.plot(steps, values, color=SERIES[j % len(SERIES)], linestyle=_LINE_STYLES[j % len(_LINE_STYLES)],
                linewidth=1.2, label=key.replace("_", " "))
        drawn.append(values)
    if log and any(np.nanmax(v, initial=0.0) > 0 for v in drawn):
        ax.set_yscale("log", nonpositive="mask")  # a loss of exactly 0 leaves a gap


def _figure(size: tuple[float, float]):
    fig = Figure(figsize=size, dpi=_DPI)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    _style_axes(ax)
    return fig, ax


def _style_axes(ax) -> None:
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(labelsize=7)
    ax.grid(axis="y", color="#dddddd", linewidth=0.6)
    ax.set_axisbelow(True)


def _png(fig: Figure, *, tight: bool = True) -> bytes:
    if tight:
        fig.tight_layout()
    fig.canvas.draw()
    rgb = Image.fromarray(np.asarray(fig.canvas.buffer_rgba())).convert("RGB")
    fig.clf()
    # Line art needs few colours: a 128-colour palette cuts the PNG to about a third, which
    # keeps a many-encoder report small. PIL writes no text chunks, so the file carries no
    # "Software" note with a web address in it.
    buffer = io.BytesIO()
    rgb.quantize(colors=_PALETTE_COLOURS, method=Image.Quantize.MEDIANCUT).save(buffer, format="PNG", optimize=True)
    return buffer.getvalue()


def _bar_size(count: int) -> tuple[float, float]:
    return (max(4.2, min(8.0, 1.8 + 1.2 * count)), 3.6)


def _categorical_axis(ax, x: np.ndarray, labels: Sequence[str]) -> None:
    # Whole names, wrapped onto lines instead of cut: two encoders that share a prefix
    # ("workbench CNN, clean-only ...") must stay told apart.
    ax.set_xticks(x)
    ax.set_xticklabels([_wrap(s, 16) for s in labels], fontsize=_TICK_PT)
    ax.set_xlim(-0.7, len(labels) - 0.3)


def _error_bars(ax, x: np.ndarray, values, intervals) -> None:
    for xi, value, interval in zip(x, values, intervals):
        if value is None or interval is None:
            continue
        lo, hi = interval
        ax.errorbar([xi], [value], yerr=[[max(0.0, value - lo)], [max(0.0, hi - value)]],
                    color="#000000", capsize=4, linewidth=1)


def _link_indices(n: int, links: int) -> np.ndarray:
    if n == 0 or links <= 0:
        return np.array([], dtype=int)
    return np.unique(np.linspace(0, n - 1, num=min(n, links)).round().astype(int))


def _curve(values, length: int):
    if not values or len(values) != length:
        return None
    return np.array([v if v is not None else np.nan for v in values], dtype=float)


def _wrap(text: str, width: int) -> str:
    """``text`` broken onto lines of at most ``width`` characters (words kept whole)."""
    lines = [line for part in str(text).split("\n") for line in (textwrap.wrap(part, width) or [""])]
    return _plain("\n".join(lines))


def _short(text: str, limit: int) -> str:
    text = str(text)
    text = text if len(text) <= limit else text[: limit - 1] + "\u2026"
    return _plain(text)


def _plain(text: str) -> str:
    # A "$" in an encoder or label name would switch matplotlib into math mode.
    return str(text).replace("$", r"\$")
