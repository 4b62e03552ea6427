"""The self-contained HTML report that compares encoders.

One file, no network: CSS inline, every figure and thumbnail a ``data:`` URI, no script.
Every piece of user-supplied text (encoder names, specs, file names, paths, error
messages) goes through :func:`html.escape` before it reaches the page.
"""

from __future__ import annotations

import datetime as _dt
import html
import io
import json
import math
import os
import tempfile
from pathlib import Path
from typing import Iterable, Mapping, Sequence

from PIL import Image

import invariance
from invariance._io import atomic_write_text, check_writable
from invariance.errors import InvarianceError
from invariance.report import plots
from invariance.results import check_same_dataset, display_name, make_comparison, metric_value, rank_results

THUMBNAIL_PX = 96
WORST_PAIRS = 6
EXAMPLE_PAIRS = 3
CHANCE = 0.5
_DASH = "\u2013"


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
    """
    comparison = make_comparison(results, failures=failures, warnings=warnings)
    results = comparison["results"]
    if not results and not comparison["failures"]:
        raise InvarianceError("no results to report: pass one or more RESULT.json files")
    ctx = _Context(results, _Thumbnails(image_root_overrides), tsne)
    title = title or _default_title(results)
    body = "\n".join([
        _header(title, results),
        _warnings_section(comparison["warnings"], results),
        _nav(ctx),
        _summary_section(ctx),
        _charts_section(ctx),
        *(_encoder_section(ctx, i) for i in ctx.order),
        _failures_section(comparison["failures"]),
        _data_section(ctx),
        _environment_section(ctx),
        _notes_section(),
        _footer(),
    ])
    return _page(title, body)


class _Context:
    """What every section needs: the results, their rank order and the thumbnail reader."""

    def __init__(self, results: list[dict], thumbnails: "_Thumbnails", tsne: bool):
        self.results = results
        self.order = rank_results(results)
        self.rank = {index: position + 1 for position, index in enumerate(self.order)}
        self.names = [display_name(r) for r in results]
        self.thumbnails = thumbnails
        self.tsne = tsne


class _Thumbnails:
    """Reads data set images once and returns ~96 px PNG data URIs (``None`` when unreadable)."""

    def __init__(self, overrides):
        self._overrides = overrides
        self._cache: dict[Path, str | None] = {}

    def root(self, dataset: dict) -> Path | None:
        stored = dataset.get("path")
        if isinstance(self._overrides, Mapping):
            chosen = self._overrides.get(stored) or self._overrides.get(str(stored))
        else:
            chosen = self._overrides
        chosen = chosen if chosen is not None else stored
        return Path(chosen) if chosen else None

    def uri(self, dataset: dict, side: str, name: str) -> str | None:
        root = self.root(dataset)
        if root is None:
            return None
        folder = (root / side).resolve()
        candidate = (folder / str(name)).resolve()
        # A name in a result file must not reach outside the data set folder.
        if not candidate.is_relative_to(folder) or not candidate.is_file():
            return None
        if candidate not in self._cache:
            self._cache[candidate] = _thumbnail_uri(candidate)
        return self._cache[candidate]


def _thumbnail_uri(path: Path) -> str | None:
    try:
        with Image.open(path) as image:
            image = image.convert("RGB")
            image.thumbnail((THUMBNAIL_PX, THUMBNAIL_PX))
            buffer = io.BytesIO()
            image.save(buffer, format="PNG", optimize=True)
    except (OSError, ValueError, Image.DecompressionBombError):
        return None
    return plots.to_data_uri(buffer.getvalue())


# ---------------------------------------------------------------- formatting

def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _num(value, digits: int = 3) -> str:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        return "\u2013"
    return f"{value:.{digits}f}"


def _interval(ci, digits: int = 3) -> str:
    if not isinstance(ci, (list, tuple)) or len(ci) != 2:
        return ""
    return f"[{_num(ci[0], digits)}, {_num(ci[1], digits)}]"


def _p(value) -> str:
    if not isinstance(value, (int, float)) or isinstance(value, bool):
        return "p \u2013"
    return "p < 0.001" if value < 0.001 else f"p = {value:.3f}"


def _as_list(value) -> list:
    if value is None:
        return []
    return list(value) if isinstance(value, (list, tuple)) else [value]


def _entry(metrics: dict, name: str):
    """``(entry, reason)``: the metric dict, or ``None`` with why it is missing."""
    entry = metrics.get(name) if isinstance(metrics, dict) else None
    if entry is None:
        return None, "not reported"
    if isinstance(entry, dict) and "not_computable" in entry:
        return None, f"not computable: {entry['not_computable']}"
    if not isinstance(entry, (dict, int, float)):
        return None, "unreadable value in the result file"
    return entry, None


def _cell(value: str, reading: str = "", kind: str = "", interval: str = "") -> str:
    interval_html = f'<span class="ci">{_e(interval)}</span>' if interval else ""
    reading_html = f'<span class="reading {kind}">{_e(reading)}</span>' if reading else ""
    return f'<td><span class="value">{_e(value)}</span>{interval_html}{reading_html}</td>'


def _missing_cell(reason: str) -> str:
    return f'<td class="missing"><span class="reading">{_e(reason)}</span></td>'


def _img(uri: str | None, alt: str, cls: str = "chart") -> str:
    if uri is None:
        return ""
    return f'<img class="{cls}" src="{uri}" alt="{_e(alt)}">'


def _figure(png: bytes | None, alt: str, caption: str = "") -> str:
    if png is None:
        return ""
    caption_html = f"<figcaption>{_e(caption)}</figcaption>" if caption else ""
    return f"<figure>{_img(plots.to_data_uri(png), alt)}{caption_html}</figure>"


def _table(headers: Sequence[str], rows: Sequence[str], cls: str = "") -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in headers)
    return (f'<div class="table-wrap"><table class="{cls}"><thead><tr>{head}</tr></thead>'
            f'<tbody>{"".join(rows)}</tbody></table></div>')


# ---------------------------------------------------------------- plain readings
# The cut-offs below are reading aids chosen for this report, not gates and not taken
# from a paper: they put words next to numbers; the numbers and intervals decide.

def _read_accuracy(accuracy: float, ci) -> tuple[str, str]:
    if isinstance(ci, (list, tuple)) and len(ci) == 2 and ci[0] <= CHANCE <= ci[1]:
        return "close to chance", "good"
    if accuracy < CHANCE:
        return "below chance (check the splits)", "warn"
    if accuracy < 0.6:
        return "barely separable", "fair"
    if accuracy < 0.8:
        return "partly separable", "warn"
    if accuracy < 0.95:
        return "separable", "bad"
    return "fully separable", "bad"


# Bands as (bound, words, tone), checked in order; the last band has no bound. For
# "lower is better" metrics a value at or below the bound falls in the band; for "higher is
# better" ones a value at or above it.
_LOWER_IS_BETTER = {
    "pad": ((0.2, "small", "good"), (1.0, "moderate", "warn"), (None, "large", "bad")),
    "drift": ((0.1, "small", "good"), (0.3, "moderate", "fair"), (0.7, "large", "warn"),
              (None, "near a scene change", "bad")),
    "gap": ((0.02, "task kept", "good"), (0.1, "some loss", "warn"), (None, "task degraded", "bad")),
}
_HIGHER_IS_BETTER = {
    "retrieval": ((0.9, "own pair found", "good"), (0.5, "often found", "warn"), (None, "often lost", "bad")),
    "cka": ((0.9, "very similar", "good"), (0.7, "similar", "fair"), (0.4, "partly similar", "warn"),
            (None, "dissimilar", "bad")),
}


def _band(metric: str, value: float) -> tuple[str, str]:
    lower = metric in _LOWER_IS_BETTER
    for bound, words, tone in (_LOWER_IS_BETTER if lower else _HIGHER_IS_BETTER)[metric]:
        if bound is None or (value <= bound if lower else value >= bound):
            return words, tone
    raise AssertionError("the last band has no bound")


def _read_pad(distance: float) -> tuple[str, str]:
    return _band("pad", distance)


def _read_mmd(p_value) -> tuple[str, str]:
    if isinstance(p_value, (int, float)) and p_value < 0.05:
        return "distributions differ", "bad"
    return "no difference detected", "good"


def _read_drift(drift: float) -> tuple[str, str]:
    return _band("drift", drift)


def _read_retrieval(top1: float) -> tuple[str, str]:
    return _band("retrieval", top1)


def _read_cka(cka: float) -> tuple[str, str]:
    return _band("cka", cka)


def _read_gap(gap: float) -> tuple[str, str]:
    return _band("gap", gap)


# ---------------------------------------------------------------- metric cells

def _accuracy_cell(metrics: dict) -> str:
    entry, reason = _entry(metrics, "domain_classifier")
    accuracy = metric_value(metrics, "domain_classifier", "accuracy")
    if entry is None or accuracy is None:
        return _missing_cell(reason or "not reported")
    ci = _ci(metrics, "domain_classifier", "ci")
    reading, kind = _read_accuracy(accuracy, ci)
    if entry.get("small_sample"):
        reading += "; small sample"
    return _cell(_num(accuracy), reading, kind, _interval(ci))


def _pad_cell(metrics: dict) -> str:
    entry, reason = _entry(metrics, "domain_classifier")
    distance = metric_value(metrics, "domain_classifier", "proxy_a_distance")
    if entry is None or distance is None:
        return _missing_cell(reason or "not reported")
    return _cell(_num(distance), *_read_pad(distance))


def _mmd_cell(metrics: dict) -> str:
    entry, reason = _entry(metrics, "mmd")
    value = metric_value(metrics, "mmd", "mmd2")
    if entry is None or value is None:
        return _missing_cell(reason or "not reported")
    return _cell(_num(value, 4), *_read_mmd(entry.get("p_value")), _p(entry.get("p_value")))


def _drift_cell(metrics: dict) -> str:
    entry, reason = _entry(metrics, "paired_drift")
    drift = metric_value(metrics, "paired_drift", "relative_drift")
    if entry is None or drift is None:
        return _missing_cell(reason or "not reported")
    return _cell(_num(drift), *_read_drift(drift), _interval(_ci(metrics, "paired_drift", "relative_drift_ci")))


def _retrieval_cell(metrics: dict) -> str:
    entry, reason = _entry(metrics, "paired_drift")
    top1 = metric_value(metrics, "paired_drift", "pair_retrieval_top1")
    if entry is None or top1 is None:
        return _missing_cell(reason or "not reported")
    return _cell(_num(top1), *_read_retrieval(top1))


def _cka_cell(metrics: dict) -> str:
    _, reason = _entry(metrics, "cka")
    cka = metric_value(metrics, "cka")
    if cka is None:
        return _missing_cell(reason or "not reported")
    return _cell(_num(cka), *_read_cka(cka))


def _probe_entries(metrics: dict) -> tuple[list[tuple[str, dict | None, str | None]], str | None]:
    """Each probe label with its entry (or the reason it is missing), or one reason for all."""
    probes, reason = _entry(metrics, "probe")
    if probes is None:
        return [], reason
    if not isinstance(probes, dict) or not probes:
        return [], "no label columns to probe"
    entries = []
    for task, entry in probes.items():
        if isinstance(entry, dict) and "not_computable" in entry:
            entries.append((task, None, f"not computable: {entry['not_computable']}"))
        elif isinstance(entry, dict):
            entries.append((task, entry, None))
    return entries, None


def _worst_gap(metrics: dict) -> tuple[str, float] | None:
    entries, _ = _probe_entries(metrics)
    gaps = [(task, float(e["gap"])) for task, e, _ in entries
            if e is not None and isinstance(e.get("gap"), (int, float)) and math.isfinite(e["gap"])]
    return max(gaps, key=lambda item: item[1]) if gaps else None


def _gap_cell(metrics: dict) -> str:
    worst = _worst_gap(metrics)
    if worst is None:
        entries, reason = _probe_entries(metrics)
        reasons = [r for _, _, r in entries if r]
        return _missing_cell(reason or (reasons[0] if reasons else "no probe"))
    task, gap = worst
    return _cell(_num(gap), *_read_gap(gap), f"on {task}")


def _gates(result: dict) -> tuple[list[str], list[str]]:
    gates = result.get("gates") or {}
    met = [name for name, g in gates.items() if isinstance(g, dict) and g.get("passed")]
    failed = [name for name, g in gates.items() if isinstance(g, dict) and not g.get("passed")]
    return met, failed


def _gates_cell(result: dict) -> str:
    met, failed = _gates(result)
    if not met and not failed:
        return _cell("none set")
    if failed:
        return _cell(f"{len(failed)} of {len(met) + len(failed)} failed", ", ".join(failed), "bad")
    return _cell(f"all {len(met)} met", "", "good")


# ---------------------------------------------------------------- page frame

def _page(title: str, body: str) -> str:
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
        f"<title>{_e(title)}</title>\n<style>\n{_CSS}\n</style>\n</head>\n<body>\n"
        f"<main class=\"page\">\n{body}\n</main>\n</body>\n</html>\n"
    )


def _default_title(results: list[dict]) -> str:
    if len(results) == 1:
        return f"Clutter invariance of {display_name(results[0])}"
    return f"Clutter invariance: {len(results)} encoders compared"


def _today() -> str:
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


def _caution(element_id: str) -> str:
    return (f'<aside class="caution" id="{element_id}" role="note"><strong>Safety caution.</strong> '
            f"{_e(invariance.SAFETY_CAUTION)}</aside>")


def _header(title: str, results: list[dict]) -> str:
    datasets = _datasets(results)
    described = "; ".join(
        f"{_e(d['path'])} ({_e(d['pairs'])} pairs)" for d in datasets
    ) or "none"
    return (
        f'<header id="header"><p class="kicker">invariance report</p><h1>{_e(title)}</h1>'
        f'<dl class="meta"><dt>Date</dt><dd>{_e(_today())}</dd>'
        f'<dt>Data set</dt><dd>{described}</dd>'
        f'<dt>Encoders</dt><dd>{len(results)}</dd></dl>'
        f'{_caution("safety-caution")}</header>'
    )


def _warnings_section(warnings: list[str], results: list[dict]) -> str:
    items = list(warnings)
    for result in results:
        for warning in _as_list(result.get("warnings")):
            items.append(f"{display_name(result)}: {warning}")
    if not items:
        return ""
    lis = "".join(f"<li>{_e(w)}</li>" for w in items)
    return (f'<section id="warnings" class="warnings" role="alert"><h2>Warnings</h2>'
            f"<ul>{lis}</ul></section>")


def _nav(ctx: _Context) -> str:
    links = [("summary", "Summary"), ("charts", "Charts")]
    links += [(f"encoder-{i}", f"{ctx.rank[i]}. {ctx.names[i]}") for i in ctx.order]
    links += [("failures", "Failures"), ("data", "Data set"), ("environment", "Environment"),
              ("reading-notes", "Reading notes")]
    items = "".join(f'<li><a href="#{anchor}">{_e(text)}</a></li>' for anchor, text in links)
    return f'<nav class="toc" aria-label="Contents"><ul>{items}</ul></nav>'


def _footer() -> str:
    return (f'<footer><p>Written by invariance {_e(invariance.__version__)} on {_e(_today())}. '
            "Self-contained: no file or address outside this page is needed.</p></footer>")


# ---------------------------------------------------------------- summary

_SUMMARY_HEADERS = (
    "Rank", "Encoder", "Domain accuracy [95% interval]", "Proxy A-distance", "MMD\u00b2 (p)",
    "Relative drift [95% interval]", "Pair retrieval (top-1)", "CKA", "Worst probe gap", "Gates",
)


def _summary_row(ctx: _Context, index: int) -> str:
    result = ctx.results[index]
    metrics = result.get("metrics") or {}
    spec = (result.get("encoder") or {}).get("spec", "")
    name = (f'<td class="name"><a href="#encoder-{index}">{_e(ctx.names[index])}</a>'
            f'<span class="spec">{_e(spec)}</span></td>')
    cells = [
        f'<td class="rank">{ctx.rank[index]}</td>', name, _accuracy_cell(metrics), _pad_cell(metrics),
        _mmd_cell(metrics), _drift_cell(metrics), _retrieval_cell(metrics), _cka_cell(metrics),
        _gap_cell(metrics), _gates_cell(result),
    ]
    return f"<tr>{''.join(cells)}</tr>"


def _summary_section(ctx: _Context) -> str:
    if not ctx.results:
        return ('<section id="summary"><h2>Summary</h2><p class="verdict">No encoder finished; '
                "see the failures below.</p></section>")
    rows = [_summary_row(ctx, i) for i in ctx.order]
    return (
        '<section id="summary"><h2>Summary</h2>'
        f'<p class="verdict">{_verdict(ctx)}</p>'
        f"{_table(_SUMMARY_HEADERS, rows, 'summary')}"
        '<p class="rule">Ranking rule: lower held-out domain accuracy first (0.5 is chance: the '
        "classifier cannot tell clean from cluttered); accuracies equal to three decimals are "
        "ordered by lower relative drift; encoders whose domain accuracy is not computable come "
        "last. The words under each number are reading aids; the intervals decide.</p></section>"
    )


def _verdict(ctx: _Context) -> str:
    """One paragraph in plain words: who ranks first, how sure, and what it means."""
    best = ctx.order[0]
    parts = [_verdict_best(ctx, best)]
    worst_gap = _worst_gap(ctx.results[best].get("metrics") or {})
    if worst_gap is not None:
        task, gap = worst_gap
        parts.append(f"Its largest loss of task information under clutter is {_num(gap)} on "
                     f"\u201c{_e(task)}\u201d ({_e(_read_gap(gap)[0])}).")
    if len(ctx.order) > 1:
        parts.append(_verdict_runner_up(ctx, best, ctx.order[1]))
    failed = [ctx.names[i] for i in ctx.order if _gates(ctx.results[i])[1]]
    if failed:
        parts.append(f"Gates failed for: {_e(', '.join(failed))}.")
    if len(ctx.results) > 1 and check_same_dataset(ctx.results):
        parts.append("<strong>The encoders were measured on different data sets</strong> (see Warnings), "
                     "so this ranking is not a like-for-like comparison.")
    return " ".join(parts)


def _verdict_best(ctx: _Context, best: int) -> str:
    metrics = ctx.results[best].get("metrics") or {}
    name = _e(ctx.names[best])
    accuracy = metric_value(metrics, "domain_classifier", "accuracy")
    drift = metric_value(metrics, "paired_drift", "relative_drift")
    if accuracy is None:
        return (f"No encoder has a computable domain accuracy; {name} is listed first by "
                "relative drift. Read the reasons in the table before drawing conclusions.")
    ci = _ci(metrics, "domain_classifier", "ci")
    text = (f"<strong>{name}</strong> ranks first: a linear classifier tells its clean and "
            f"cluttered features apart on {_num(accuracy)} of held-out images "
            f"(95% interval {_interval(ci)}; 0.5 would be chance)")
    if drift is not None:
        text += (f", and clutter moves a scene\u2019s feature {_num(drift, 2)} of the way to a "
                 "different scene")
    reading = _read_accuracy(accuracy, ci)[0]
    if reading == "close to chance":
        return text + ". On this data its clean and cluttered features could not be told apart."
    return text + f". Even so, clutter is still detectable in its features ({reading})."


def _verdict_runner_up(ctx: _Context, best: int, second: int) -> str:
    a = _ci(ctx.results[best].get("metrics") or {}, "domain_classifier", "ci")
    b = _ci(ctx.results[second].get("metrics") or {}, "domain_classifier", "ci")
    text = f"Next is {_e(ctx.names[second])}"
    accuracy = metric_value(ctx.results[second].get("metrics") or {}, "domain_classifier", "accuracy")
    if accuracy is not None:
        text += f" at {_num(accuracy)} {_interval(b)}"
    if a is None or b is None:
        return text + "."
    if _overlap(a, b):
        return text + ("; the two intervals overlap, so this data does not settle the order "
                       "between them (more pairs would narrow the intervals).")
    return text + "; the intervals do not overlap, so the first place is clear on this data."


def _overlap(a: tuple[float, float], b: tuple[float, float]) -> bool:
    return a[0] <= b[1] and b[0] <= a[1]


# ---------------------------------------------------------------- charts across encoders

def _charts_section(ctx: _Context) -> str:
    if not ctx.results:
        return '<section id="charts"><h2>Charts</h2><p>No results to chart.</p></section>'
    labels = [ctx.names[i] for i in ctx.order]
    metrics = [ctx.results[i].get("metrics") or {} for i in ctx.order]
    figures = [
        _accuracy_chart(labels, metrics),
        _drift_chart(labels, metrics),
        _figure(plots.bar_with_intervals(labels, [metric_value(m, "cka") for m in metrics],
                                         ylabel=plots.CKA_LABEL, title="Linear CKA, clean vs cluttered",
                                         ylim=(0, 1.05)), "CKA per encoder"),
        _mmd_chart(labels, metrics),
        *_probe_charts(labels, metrics),
    ]
    return ('<section id="charts"><h2>Charts</h2><p>Encoders in rank order; black bars are 95% '
            f'intervals.</p><div class="grid">{"".join(figures)}</div></section>')


def _accuracy_chart(labels, metrics) -> str:
    values = [metric_value(m, "domain_classifier", "accuracy") for m in metrics]
    cis = [_ci(m, "domain_classifier", "ci") for m in metrics]
    png = plots.bar_with_intervals(labels, values, cis, ylabel=plots.ACCURACY_LABEL,
                                   title="Domain classifier accuracy (lower is better)",
                                   reference=CHANCE, reference_label="chance (0.5)", ylim=(0, 1.05))
    return _figure(png, "domain accuracy per encoder")


def _drift_chart(labels, metrics) -> str:
    values = [metric_value(m, "paired_drift", "relative_drift") for m in metrics]
    cis = [_ci(m, "paired_drift", "relative_drift_ci") for m in metrics]
    png = plots.bar_with_intervals(labels, values, cis, ylabel=plots.DRIFT_LABEL,
                                   title="Relative drift per pair (lower is better)")
    return _figure(png, "relative drift per encoder")


def _mmd_chart(labels, metrics) -> str:
    values = [metric_value(m, "mmd", "mmd2") for m in metrics]
    notes = [_p((m.get("mmd") or {}).get("p_value")) if v is not None else "" for m, v in zip(metrics, values)]
    png = plots.bar_with_intervals(labels, values, ylabel=plots.MMD_LABEL,
                                   title="MMD\u00b2 with permutation p-value (lower is better)",
                                   annotations=notes)
    return _figure(png, "MMD squared per encoder")


def _probe_charts(labels, metrics) -> list[str]:
    tasks: dict[str, str] = {}
    for m in metrics:
        for task, entry, _ in _probe_entries(m)[0]:
            if entry is not None:
                tasks.setdefault(task, str(entry.get("metric") or "score"))
    figures = []
    for task, metric in tasks.items():
        clean, cluttered = [], []
        for m in metrics:
            entry = dict((t, e) for t, e, _ in _probe_entries(m)[0]).get(task)
            clean.append(_finite(entry.get("clean")) if entry else None)
            cluttered.append(_finite(entry.get("cluttered")) if entry else None)
        png = plots.probe_chart(labels, clean, cluttered, task=task, metric=metric)
        figures.append(_figure(png, f"probe {task} clean vs cluttered"))
    return figures


def _ci(metrics: dict, metric: str, key: str):
    entry, _ = _entry(metrics, metric)
    ci = entry.get(key) if entry else None
    if isinstance(ci, (list, tuple)) and len(ci) == 2 and all(_finite(v) is not None for v in ci):
        return float(ci[0]), float(ci[1])
    return None


def _finite(value) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        return None
    return float(value)


# ---------------------------------------------------------------- one encoder

def _encoder_section(ctx: _Context, index: int) -> str:
    result = ctx.results[index]
    metrics = result.get("metrics") or {}
    blocks = [
        lambda: _encoder_facts(result),
        lambda: _encoder_notes(result),
        lambda: _metrics_table(metrics),
        lambda: _probe_table(metrics),
        lambda: f'<div class="grid">{_projection_figures(ctx, result)}{_drift_figure(result)}</div>',
        lambda: _worst_pairs(ctx, result),
        lambda: _layers_block(result),
        lambda: _breakdown_block(result),
        lambda: _alignment_block(result),
        lambda: _gates_block(result),
    ]
    parts = [f'<section class="encoder" id="encoder-{index}">',
             f"<h2>{ctx.rank[index]}. {_e(ctx.names[index])}</h2>",
             *(_guarded(block) for block in blocks), "</section>"]
    return "\n".join(p for p in parts if p)


def _guarded(block) -> str:
    # A result file edited by hand or written by an older version may hold an odd value in
    # one optional block; the rest of the report is still worth reading, so the block says
    # what went wrong instead of the whole report failing.
    try:
        return block()
    except (TypeError, ValueError, KeyError, AttributeError, IndexError) as exc:
        return (f'<p class="missing">This part could not be drawn from the result file '
                f"({_e(type(exc).__name__)}: {_e(exc)}).</p>")


def _encoder_facts(result: dict) -> str:
    encoder = result.get("encoder") or {}
    sha = encoder.get("weights_sha256")
    facts = [
        ("Spec", encoder.get("spec")), ("Layer", encoder.get("layer")), ("Architecture", encoder.get("arch")),
        ("Weights", encoder.get("weights")), ("Weights SHA-256", sha[:16] + "\u2026" if isinstance(sha, str) else None),
        ("Preprocessing", json.dumps(encoder["preprocess"], sort_keys=True) if encoder.get("preprocess") else None),
    ]
    items = "".join(f"<dt>{_e(k)}</dt><dd><code>{_e(v)}</code></dd>" for k, v in facts if v is not None)
    return f'<dl class="facts">{items}</dl>'


def _encoder_notes(result: dict) -> str:
    entry, _ = _entry(result.get("metrics") or {}, "domain_classifier")
    notes = []
    if entry and entry.get("small_sample"):
        notes.append("Few pairs: the domain-classifier interval is wide; treat the rank as provisional.")
    if entry and entry.get("note"):
        notes.append(str(entry["note"]))
    notes += [str(w) for w in _as_list(result.get("warnings"))]
    if not notes:
        return ""
    return '<ul class="notes">' + "".join(f"<li>{_e(n)}</li>" for n in notes) + "</ul>"


def _metrics_table(metrics: dict) -> str:
    rows = [
        f"<tr><th>Domain accuracy [95% interval]</th>{_accuracy_cell(metrics)}</tr>",
        f"<tr><th>Proxy A-distance</th>{_pad_cell(metrics)}</tr>",
        f"<tr><th>MMD\u00b2 (p)</th>{_mmd_cell(metrics)}</tr>",
        f"<tr><th>Relative drift [95% interval]</th>{_drift_cell(metrics)}</tr>",
        f"<tr><th>Pair retrieval (top-1)</th>{_retrieval_cell(metrics)}</tr>",
        f"<tr><th>CKA</th>{_cka_cell(metrics)}</tr>",
    ]
    return f'<h3>Metrics</h3><div class="table-wrap"><table class="kv compact"><tbody>{"".join(rows)}</tbody></table></div>'


def _probe_table(metrics: dict) -> str:
    entries, reason = _probe_entries(metrics)
    if reason:
        return f'<h3>Linear probes</h3><p class="missing">{_e(reason)}</p>'
    rows = []
    for task, entry, why in entries:
        if entry is None:
            rows.append(f"<tr><td>{_e(task)}</td><td colspan=\"5\" class=\"missing\">{_e(why)}</td></tr>")
            continue
        gap = _finite(entry.get("gap"))
        gap_cell = _cell(_num(gap), *_read_gap(gap)) if gap is not None else _missing_cell("no gap")
        rows.append(
            f"<tr><td>{_e(task)}</td><td>{_e(entry.get('kind', ''))}, {_e(entry.get('metric', ''))}</td>"
            f"<td>{_num(entry.get('clean'))}</td><td>{_num(entry.get('cluttered'))}</td>{gap_cell}</tr>"
        )
    headers = ("Label", "Kind, score", "Clean", "Cluttered", "Gap (clean \u2212 cluttered)")
    return "<h3>Linear probes</h3>" + _table(headers, rows, "compact")


def _projection_figures(ctx: _Context, result: dict) -> str:
    projection = result.get("projection") or {}
    if isinstance(projection, dict) and "not_computable" in projection:
        return f'<p class="missing">Projection not computable: {_e(projection["not_computable"])}.</p>'
    if not projection.get("clean") or not projection.get("cluttered"):
        return '<p class="missing">No 2-D projection in this result.</p>'
    out = _figure(plots.projection_chart(projection["clean"], projection["cluttered"], method="PCA",
                                         explained=projection.get("explained_variance_ratio")),
                  "PCA projection of clean and cluttered features",
                  "Clean (blue circles) and cluttered (vermillion triangles); pairs far apart moved most.")
    if ctx.tsne:
        tsne = projection.get("tsne") or {}
        if tsne.get("clean") and tsne.get("cluttered"):
            out += _figure(plots.projection_chart(tsne["clean"], tsne["cluttered"], method="t-SNE"),
                           "t-SNE projection of clean and cluttered features")
        else:
            out += ('<p class="missing">t-SNE was asked for, but this result carries no t-SNE '
                    "coordinates (the features are not stored); PCA is shown.</p>")
    return out


def _drift_values(result: dict) -> list[tuple[str, float]]:
    pairs = result.get("pairs") or []
    return [(str(p.get("name")), float(p["drift"])) for p in pairs
            if isinstance(p, dict) and _finite(p.get("drift")) is not None]


def _worst(result: dict) -> list[tuple[str, float]]:
    return sorted(_drift_values(result), key=lambda item: -item[1])[:WORST_PAIRS]


def _drift_figure(result: dict) -> str:
    values = _drift_values(result)
    if not values:
        return '<p class="missing">No per-pair drift in this result.</p>'
    worst = _worst(result)
    png = plots.drift_histogram([d for _, d in values], worst_from=worst[-1][1] if worst else None)
    return _figure(png, "histogram of per-pair relative drift")


def _pair_figure(ctx: _Context, dataset: dict, name: str, caption: str) -> tuple[str, bool]:
    clean = ctx.thumbnails.uri(dataset, "clean", name)
    cluttered = ctx.thumbnails.uri(dataset, "cluttered", name)
    found = clean is not None and cluttered is not None
    images = (_img(clean, f"clean {name}", "thumb") + _img(cluttered, f"cluttered {name}", "thumb")) if found else ""
    return (f'<figure class="pair">{images}<figcaption><code>{_e(name)}</code> {_e(caption)}'
            f"</figcaption></figure>"), found


def _worst_pairs(ctx: _Context, result: dict) -> str:
    worst = _worst(result)
    if not worst:
        return ""
    dataset = result.get("dataset") or {}
    figures, found = [], 0
    for name, drift in worst:
        figure, ok = _pair_figure(ctx, dataset, name, f"drift {_num(drift, 2)}")
        figures.append(figure)
        found += ok
    note = "" if found == len(worst) else (
        f'<p class="missing">Images for {len(worst) - found} of these pairs were not found under '
        f"<code>{_e(ctx.thumbnails.root(dataset))}</code> (clean/ and cluttered/); names shown instead.</p>")
    return ('<h3>Worst pairs</h3><p>The scenes clutter moved most (left clean, right cluttered).</p>'
            f'{note}<div class="pairs">{"".join(figures)}</div>')


def _layers_block(result: dict) -> str:
    layers = result.get("layers")
    if not isinstance(layers, dict) or not layers:
        return ""
    names = list(layers)
    series = {
        "domain accuracy": [metric_value(layers[n], "domain_classifier", "accuracy") for n in names],
        "relative drift": [metric_value(layers[n], "paired_drift", "relative_drift") for n in names],
        "CKA": [metric_value(layers[n], "cka") for n in names],
    }
    png = plots.line_profile(names, series, xlabel="layer (network order, input to output)",
                             ylabel="value (accuracy, drift, CKA)", title="Where invariance is lost",
                             reference=CHANCE, reference_label="chance accuracy")
    rows = [f"<tr><td><code>{_e(n)}</code></td>{_accuracy_cell(layers[n])}{_drift_cell(layers[n])}"
            f"{_cka_cell(layers[n])}</tr>" for n in names]
    return ("<h3>Per-layer profile</h3>" + _figure(png, "per-layer profile")
            + _table(("Layer", "Domain accuracy", "Relative drift", "CKA"), rows, "compact"))


def _level_key(value: str):
    try:
        return (0, float(value), value)
    except ValueError:
        return (1, 0.0, value)


def _breakdown_block(result: dict) -> str:
    breakdowns = result.get("breakdowns")
    if not isinstance(breakdowns, dict) or not breakdowns:
        return ""
    levels = sorted({str(v) for b in breakdowns.values() if isinstance(b, dict) for v in b}, key=_level_key)
    figures = []
    for metric, key, ylabel in (("domain_classifier", "accuracy", plots.ACCURACY_LABEL),
                                ("paired_drift", "relative_drift", plots.DRIFT_LABEL)):
        series = {factor: [_breakdown_value(groups, level, metric, key) for level in levels]
                  for factor, groups in breakdowns.items() if isinstance(groups, dict)}
        png = plots.line_profile(levels, series, xlabel="factor value or clutter level", ylabel=ylabel,
                                 title=f"Dose-response: {ylabel.split(' (')[0]} by factor",
                                 reference=CHANCE if metric == "domain_classifier" else None,
                                 reference_label="chance" if metric == "domain_classifier" else None)
        figures.append(_figure(png, f"breakdown of {key} by factor"))
    rows = []
    for factor, groups in breakdowns.items():
        if not isinstance(groups, dict):
            continue
        for level in sorted(groups, key=lambda v: _level_key(str(v))):
            group = groups[level] if isinstance(groups[level], dict) else {}
            metrics = group.get("metrics") or {}
            rows.append(f"<tr><td>{_e(factor)}</td><td>{_e(level)}</td><td>{_e(group.get('pairs', _DASH))}</td>"
                        f"{_accuracy_cell(metrics)}{_drift_cell(metrics)}{_cka_cell(metrics)}</tr>")
    headers = ("Factor", "Value", "Pairs", "Domain accuracy", "Relative drift", "CKA")
    return ('<h3>By clutter factor and level</h3><div class="grid">' + "".join(figures) + "</div>"
            + _table(headers, rows, "compact"))


def _breakdown_value(groups: dict, level: str, metric: str, key: str) -> float | None:
    group = groups.get(level)
    if not isinstance(group, dict):
        return None
    return metric_value(group.get("metrics") or {}, metric, key)


def _alignment_block(result: dict) -> str:
    alignment = result.get("alignment")
    if not isinstance(alignment, dict):
        return ""
    before = alignment.get("before") or {}
    after = alignment.get("after") or {}
    rows = [
        f"<tr><th>Domain accuracy</th>{_accuracy_cell(before)}{_accuracy_cell(after)}</tr>",
        f"<tr><th>Proxy A-distance</th>{_pad_cell(before)}{_pad_cell(after)}</tr>",
        f"<tr><th>MMD\u00b2 (p)</th>{_mmd_cell(before)}{_mmd_cell(after)}</tr>",
        f"<tr><th>Relative drift</th>{_drift_cell(before)}{_drift_cell(after)}</tr>",
        f"<tr><th>Pair retrieval</th>{_retrieval_cell(before)}{_retrieval_cell(after)}</tr>",
        f"<tr><th>CKA</th>{_cka_cell(before)}{_cka_cell(after)}</tr>",
        f"<tr><th>Worst probe gap</th>{_gap_cell(before)}{_gap_cell(after)}</tr>",
    ]
    held_out = alignment.get("held_out_pairs")
    checkpoint = alignment.get("checkpoint")
    intro = (f"<p>Measured on {_e(held_out if held_out is not None else 'the')} held-out pairs that "
             "the alignment never trained on.")
    if checkpoint:
        intro += f" Checkpoint: <code>{_e(checkpoint)}</code>."
    curves = alignment.get("curves") or {}
    png = plots.alignment_curves(curves) if isinstance(curves, dict) else None
    return ("<h3>Alignment (gradient reversal)</h3>" + intro + "</p>"
            + _table(("Held-out metric", "Before", "After"), rows, "compact")
            + _figure(png, "alignment training curves", "Training curves: domain accuracy, losses, \u03bb."))


def _gates_block(result: dict) -> str:
    gates = result.get("gates")
    if not isinstance(gates, dict) or not gates:
        return ""
    rows = []
    for name, gate in gates.items():
        gate = gate if isinstance(gate, dict) else {}
        verdict = ('<td class="good">met</td>' if gate.get("passed") else '<td class="bad">failed</td>')
        rows.append(f"<tr><td>{_e(name)}</td><td>{_num(gate.get('threshold'))}</td>"
                    f"<td>{_num(gate.get('value'))}</td>{verdict}</tr>")
    return "<h3>Gates</h3>" + _table(("Gate", "Threshold", "Value", "Result"), rows)


# ---------------------------------------------------------------- closing sections

def _failures_section(failures: list[dict]) -> str:
    if not failures:
        return '<section id="failures"><h2>Failures</h2><p>Every encoder finished.</p></section>'
    rows = [f"<tr><td>{_e(f['name'])}</td><td><code>{_e(f['spec'])}</code></td>"
            f'<td class="error">{_e(f["error"])}</td></tr>' for f in failures]
    return ('<section id="failures"><h2>Failures</h2><p>These encoders stopped before a result; '
            "the others are reported above.</p>" + _table(("Encoder", "Spec", "Error"), rows) + "</section>")


def _datasets(results: list[dict]) -> list[dict]:
    seen: dict[tuple, dict] = {}
    for result in results:
        dataset = result.get("dataset") or {}
        key = (str(dataset.get("content_hash")), str(dataset.get("path")), str(dataset.get("pairs")))
        entry = seen.setdefault(key, {**dataset, "path": dataset.get("path", "unknown"),
                                      "pairs": dataset.get("pairs", "?"), "users": [], "first": result})
        entry["users"].append(display_name(result))
    return list(seen.values())


def _data_section(ctx: _Context) -> str:
    blocks = []
    for dataset in _datasets(ctx.results):
        size = dataset.get("image_size")
        facts = [
            ("Folder", dataset.get("path")), ("Pairs", dataset.get("pairs")),
            ("Image size (px)", f"{size[0]} \u00d7 {size[1]}" if isinstance(size, list) and len(size) == 2 else None),
            ("Clutter factors", ", ".join(map(str, dataset.get("factors") or [])) or None),
            ("Content hash", dataset.get("content_hash")), ("Used by", ", ".join(dataset["users"])),
        ]
        items = "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in facts if v is not None)
        blocks.append(f'<dl class="facts">{items}</dl>{_example_pairs(ctx, dataset)}')
    return '<section id="data"><h2>Data set</h2>' + "".join(blocks) + "</section>"


def _example_pairs(ctx: _Context, dataset: dict) -> str:
    names = [n for n, _ in _drift_values(dataset["first"])][:EXAMPLE_PAIRS]
    if not names:
        return ""
    figures, found = [], 0
    for name in names:
        figure, ok = _pair_figure(ctx, dataset, name, "")
        figures.append(figure)
        found += ok
    note = "" if found else (f'<p class="missing">Images not found under <code>{_e(ctx.thumbnails.root(dataset))}'
                             "</code>; names shown instead.</p>")
    return f'<h3>Example pairs</h3>{note}<div class="pairs">{"".join(figures)}</div>'


_ENV_KEYS = ("invariance", "python", "torch", "torchvision", "numpy", "scikit-learn", "platform",
             "device", "seed", "command")


def _environment_section(ctx: _Context) -> str:
    if not ctx.results:
        return '<section id="environment"><h2>Environment</h2><p>No results.</p></section>'
    envs = [ctx.results[i].get("environment") or {} for i in ctx.order]
    keys = [k for k in _ENV_KEYS if any(k in env for env in envs)]
    keys += sorted({k for env in envs for k in env if k not in _ENV_KEYS and k != "timings_s"})
    rows = [f"<tr><th>{_e(k)}</th>" + "".join(f"<td><code>{_e(env.get(k, _DASH))}</code></td>" for env in envs)
            + "</tr>" for k in keys]
    rows.append("<tr><th>timings (s)</th>" + "".join(f"<td>{_e(_timings(env))}</td>" for env in envs) + "</tr>")
    headers = ["", *(ctx.names[i] for i in ctx.order)]
    return '<section id="environment"><h2>Environment</h2>' + _table(headers, rows, "env") + "</section>"


def _timings(env: dict) -> str:
    timings = env.get("timings_s") or {}
    if not isinstance(timings, dict) or not timings:
        return "\u2013"
    return ", ".join(f"{k} {_num(v, 1)}" for k, v in timings.items())


_NOTES = (
    ("Domain accuracy", "A linear classifier learns to tell clean from cluttered features on some scenes and "
     "is scored on held-out scenes (both images of a scene stay on one side). 0.5 is chance, the goal; "
     "1.0 means clutter is obvious in the features. The 95% interval shows how sure the estimate is."),
    ("Proxy A-distance", "2(1 \u2212 2\u00b7error) of that classifier (Ben-David et al. 2006): 0 when the two "
     "domains cannot be told apart, 2 when they are fully separable."),
    ("MMD\u00b2", "Maximum mean discrepancy with a Gaussian kernel (Gretton et al. 2012): how different the "
     "two feature distributions are. The p-value comes from swapping clean and cluttered within pairs."),
    ("Relative drift", "How far clutter moves a scene's feature (cosine distance), divided by the typical "
     "distance between two different clean scenes: 0 is invariant, 1 is as far as a change of scene."),
    ("Pair retrieval", "How often a cluttered image's nearest clean neighbour is its own clean view. "
     "1.0 means every scene is still recognised under clutter."),
    ("CKA", "Linear centred kernel alignment (Kornblith et al. 2019) between clean and cluttered features "
     "of the same scenes: 1 means the same representation up to rotation and scale."),
    ("Linear probe gap", "A linear model trained on clean features predicts each label; the gap is its score "
     "on clean minus its score on cluttered images of held-out scenes. A large gap means clutter hides "
     "what the policy needs."),
    ("Alignment", "Gradient-reversal training (Ganin & Lempitsky 2015, DANN) of the last blocks against a "
     "domain discriminator, with anchor and task losses; before and after are measured on held-out pairs."),
)


def _notes_section() -> str:
    items = "".join(f"<dt>{_e(term)}</dt><dd>{_e(text)}</dd>" for term, text in _NOTES)
    return (f'<section id="reading-notes"><h2>Reading notes</h2><dl class="notes-list">{items}</dl>'
            f'{_caution("safety-caution-end")}</section>')


_CSS = """
:root { --ink: #1d2430; --muted: #5b6472; --line: #d9dde3; --accent: #2f5d50; --tint: #f3f5f2;
  --good: #1b6e4a; --fair: #6b5a00; --warn: #8a4b00; --bad: #a12a1c; }
* { box-sizing: border-box; }
body { margin: 0; color: var(--ink); background: #fff; font: 15px/1.5 system-ui, -apple-system,
  "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }
.page { max-width: 1120px; margin: 0 auto; padding: 1.5rem 1.25rem 3rem; }
header { border-left: 6px solid var(--accent); padding: 0.25rem 0 0.25rem 1rem; margin-bottom: 1rem; }
.kicker { margin: 0; text-transform: uppercase; letter-spacing: 0.08em; font-size: 0.75rem; color: var(--accent); }
h1 { margin: 0.2rem 0 0.6rem; font-size: 1.7rem; line-height: 1.2; }
h2 { font-size: 1.3rem; margin: 2rem 0 0.6rem; padding-bottom: 0.25rem; border-bottom: 2px solid var(--line); }
h3 { font-size: 1.05rem; margin: 1.4rem 0 0.4rem; color: var(--accent); }
dl.meta, dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: 0.15rem 1rem; margin: 0.4rem 0 0.8rem; }
dl.meta dt, dl.facts dt { color: var(--muted); }
dl.meta dd, dl.facts dd { margin: 0; overflow-wrap: anywhere; }
.caution { border: 2px solid #b86e00; background: #fff6e5; padding: 0.7rem 0.9rem; border-radius: 4px; margin: 0.8rem 0; }
.warnings { border: 2px solid var(--bad); background: #fdf0ee; padding: 0.2rem 1rem 0.4rem; border-radius: 4px; }
.warnings h2 { border: 0; margin-top: 0.6rem; color: var(--bad); }
nav.toc ul { list-style: none; padding: 0; margin: 0.6rem 0; display: flex; flex-wrap: wrap; gap: 0.35rem 0.5rem; }
nav.toc a { display: inline-block; padding: 0.15rem 0.6rem; border: 1px solid var(--line); border-radius: 999px;
  color: var(--accent); text-decoration: none; font-size: 0.85rem; }
.verdict { background: var(--tint); border-left: 4px solid var(--accent); padding: 0.7rem 0.9rem; margin: 0.6rem 0 1rem; }
.rule, figcaption, .missing { color: var(--muted); font-size: 0.85rem; }
.table-wrap { overflow-x: auto; margin: 0.4rem 0 1rem; }
table { border-collapse: collapse; width: 100%; font-size: 0.88rem; }
th, td { text-align: left; vertical-align: top; padding: 0.4rem 0.45rem; border-bottom: 1px solid var(--line); }
thead th { background: var(--tint); font-weight: 600; font-size: 0.8rem; line-height: 1.25; }
table.summary td.name { min-width: 9.5rem; }
table.compact td .ci, table.compact td .reading { display: inline; margin-left: 0.45em; }
table.compact td .value { display: inline; }
table.kv { max-width: 46rem; }
table.kv th { width: 16rem; font-weight: 500; color: var(--muted); }
td .value { display: block; font-variant-numeric: tabular-nums; white-space: nowrap; }
td .ci { display: block; font-size: 0.75rem; color: var(--muted); white-space: nowrap; }
td .reading { display: block; font-size: 0.78rem; color: var(--muted); }
.reading.good, td.good { color: var(--good); } .reading.fair { color: var(--fair); }
.reading.warn { color: var(--warn); } .reading.bad, td.bad { color: var(--bad); }
td.rank { font-weight: 700; font-size: 1.1rem; }
td.name a { font-weight: 600; color: var(--ink); }
.spec { display: block; font-family: ui-monospace, Menlo, Consolas, monospace; font-size: 0.75rem; color: var(--muted);
  overflow-wrap: anywhere; }
td.error { font-family: ui-monospace, Menlo, Consolas, monospace; font-size: 0.8rem; white-space: pre-wrap; }
code { font-family: ui-monospace, Menlo, Consolas, monospace; font-size: 0.85em; overflow-wrap: anywhere; }
.grid { display: grid; grid-template-columns: repeat(auto-fit, minmax(340px, 1fr)); gap: 0.8rem 1.2rem; align-items: start; }
figure { margin: 0; }
img.chart { max-width: 100%; height: auto; display: block; }
.pairs { display: flex; flex-wrap: wrap; gap: 0.8rem; }
figure.pair { border: 1px solid var(--line); border-radius: 4px; padding: 0.4rem; }
img.thumb { width: 96px; height: auto; margin-right: 4px; image-rendering: auto; }
ul.notes { color: var(--warn); }
dl.notes-list dt { font-weight: 600; margin-top: 0.6rem; }
dl.notes-list dd { margin: 0.1rem 0 0 0; }
footer { margin-top: 2rem; color: var(--muted); font-size: 0.8rem; border-top: 1px solid var(--line); }
@media (max-width: 700px) { .grid { grid-template-columns: 1fr; } h1 { font-size: 1.35rem; } }
@media print {
  body { font-size: 11pt; } .page { max-width: none; padding: 0; }
  nav.toc { display: none; }
  .caution, .warnings, .verdict, thead th { background: none; }
  section.encoder { break-before: page; }
  figure, table, .caution { break-inside: avoid; }
  .table-wrap { overflow: visible; }
  a { color: inherit; text-decoration: none; }
}
"""
