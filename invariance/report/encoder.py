"""The context of one encoder's section: facts, metrics, probes, figures and optional blocks.

Each block is built on its own and wrapped as ``{"data", "error"}``: a result file edited
by hand or written by an older version may hold an odd value in one optional block, and
the rest of the report is still worth reading, so that block says what went wrong instead
of the whole report failing. ``data`` is ``None`` when the result has nothing to show.
"""

from __future__ import annotations

import json
from typing import Callable

from invariance import readings
from invariance.report import cells, plots
from invariance.report.charts import figure
from invariance.report.thumbnails import Thumbnails
from invariance.results import metric_value

# Thumbnails of the scenes clutter moved most, per encoder: enough to spot a pattern
# (one kind of clutter, one part), few enough to keep the report light (common practice).
WORST_PAIRS = 6

_GUARDED = (TypeError, ValueError, KeyError, AttributeError, IndexError)


def encoder_section(result: dict, *, index: int, rank: int, name: str, thumbnails: Thumbnails,
                    tsne: bool) -> dict:
    """Everything the ``encoder`` template needs for one result.

    Parameters
    ----------
    result : dict
        One ``invariance.result/1`` object.
    index : int
        Its position in the results (the section id is ``encoder-<index>``).
    rank : int
        Its place in the ranking, from 1.
    name : str
        Its display name.
    thumbnails : Thumbnails
        Reader of the data set images.
    tsne : bool
        Whether a t-SNE view was asked for.

    Returns
    -------
    dict
        ``index``, ``rank``, ``name`` and one ``{"data", "error"}`` per block.
    """
    metrics = result.get("metrics") or {}
    builders: dict[str, Callable[[], object]] = {
        "facts": lambda: _facts(result),
        "notes": lambda: _notes(result),
        "metrics": lambda: cells.metric_rows(metrics),
        "probes": lambda: _probe_table(metrics),
        "views": lambda: _projection_views(result, tsne) + [_drift_view(result)],
        "worst": lambda: _worst_pairs(result, thumbnails),
        "layers": lambda: _layers(result),
        "breakdowns": lambda: _breakdowns(result),
        "alignment": lambda: _alignment(result),
        "gates": lambda: _gates(result),
    }
    section = {"index": index, "rank": rank, "name": name}
    for key, build in builders.items():
        section[key] = _guarded(build)
    return section


def _guarded(build: Callable[[], object]) -> dict:
    try:
        return {"data": build(), "error": None}
    except _GUARDED as exc:
        return {"data": None, "error": f"{type(exc).__name__}: {exc}"}


def _facts(result: dict) -> list[tuple[str, str]]:
    encoder = result.get("encoder") or {}
    sha = encoder.get("weights_sha256")
    weights = encoder.get("weights")
    if weights is None and str(encoder.get("spec", "")).startswith("torchvision:") and "@" not in str(encoder["spec"]):
        weights = "random initialisation (seeded): a random-weights reference, not a trained encoder"
    facts = [
        ("Spec", encoder.get("spec")), ("Layer", encoder.get("layer")), ("Architecture", encoder.get("arch")),
        ("Weights", weights), ("Weights SHA-256", sha[:16] + "\u2026" if isinstance(sha, str) else None),
        ("Preprocessing", json.dumps(encoder["preprocess"], sort_keys=True) if encoder.get("preprocess") else None),
    ]
    return [(k, str(v)) for k, v in facts if v is not None]


def as_list(value) -> list:
    """``value`` as a list: ``None`` is empty, a single item becomes a one-item list."""
    if value is None:
        return []
    return list(value) if isinstance(value, (list, tuple)) else [value]


def _notes(result: dict) -> list[str]:
    found, _ = cells.entry(result.get("metrics") or {}, "domain_classifier")
    notes = []
    if found and found.get("small_sample"):
        notes.append(readings.SMALL_SAMPLE_NOTE)
    if found and found.get("note"):
        notes.append(str(found["note"]))
    return notes + [str(w) for w in as_list(result.get("warnings"))]


def _probe_table(metrics: dict) -> dict:
    entries, reason = cells.probe_entries(metrics)
    rows = []
    for task, found, why in entries:
        row = {"task": task, "missing": why, "kind": "", "clean": "", "cluttered": "", "baseline": "", "gap": None}
        if found is not None:
            row.update(kind=f"{found.get('kind', '')}, {readings.gap_unit(found)}",
                       clean=readings.format_number(found.get("clean")),
                       cluttered=readings.format_number(found.get("cluttered")),
                       baseline=readings.format_number(found.get("baseline")),
                       gap=_probe_gap_cell(found))
        rows.append(row)
    return {"reason": reason, "rows": rows}


def _probe_gap_cell(found: dict) -> dict:
    gap = readings.finite(found.get("gap"))
    if gap is None:
        return cells.missing_cell("no gap")
    reading = readings.read_probe(found)
    if reading.words == readings.NOT_DECODABLE:
        return cells.cell(f"{readings.format_number(gap)} {readings.gap_unit(found)}", reading,
                          "left out of the worst gap and the gate")
    return cells.cell(f"{readings.format_number(gap)} {readings.gap_unit(found)}", reading,
                      readings.format_interval(found.get("gap_ci")))


def _view(fig: dict | None = None, missing: str | None = None) -> dict:
    return {"figure": fig, "missing": missing}


def _projection_views(result: dict, tsne: bool) -> list[dict]:
    projection = result.get("projection") or {}
    if isinstance(projection, dict) and "not_computable" in projection:
        return [_view(missing=f"Projection not computable: {projection['not_computable']}.")]
    if not projection.get("clean") or not projection.get("cluttered"):
        return [_view(missing="No 2-D projection in this result.")]
    views = [_view(figure(plots.projection_chart(projection["clean"], projection["cluttered"], method="PCA",
                                                 explained=projection.get("explained_variance_ratio")),
                          "PCA projection of clean and cluttered features",
                          "Clean (blue circles) and cluttered (vermillion triangles); pairs far apart moved most."))]
    if tsne:
        coords = projection.get("tsne") or {}
        if coords.get("clean") and coords.get("cluttered"):
            views.append(_view(figure(plots.projection_chart(coords["clean"], coords["cluttered"], method="t-SNE"),
                                      "t-SNE projection of clean and cluttered features")))
        else:
            views.append(_view(missing="t-SNE was asked for, but this result carries no t-SNE coordinates "
                                       "(the features are not stored); PCA is shown."))
    return views


def drift_values(result: dict) -> list[tuple[str, float]]:
    """``(pair name, relative drift)`` for every pair with a finite drift, in data set order."""
    pairs = result.get("pairs") or []
    return [(str(p.get("name")), float(p["drift"])) for p in pairs
            if isinstance(p, dict) and readings.finite(p.get("drift")) is not None]


def _worst(result: dict) -> list[tuple[str, float]]:
    return sorted(drift_values(result), key=lambda item: -item[1])[:WORST_PAIRS]


def _drift_view(result: dict) -> dict:
    values = drift_values(result)
    if not values:
        return _view(missing="No per-pair drift in this result.")
    worst = _worst(result)
    mean = metric_value(result.get("metrics") or {}, "paired_drift", "relative_drift")
    png = plots.drift_histogram([d for _, d in values], worst_from=worst[-1][1] if worst else None, mean=mean)
    return _view(figure(png, "histogram of per-pair relative drift",
                        "The headline drift is the mean over pairs (solid line); the dashed black line is the median."))


def pair_figure(thumbnails: Thumbnails, dataset: dict, name: str, caption: str) -> dict:
    """One scene's clean and cluttered thumbnails (``found`` only when both could be read)."""
    clean = thumbnails.uri(dataset, "clean", name)
    cluttered = thumbnails.uri(dataset, "cluttered", name)
    return {"name": name, "caption": caption, "clean": clean, "cluttered": cluttered,
            "found": clean is not None and cluttered is not None}


def _worst_pairs(result: dict, thumbnails: Thumbnails) -> dict | None:
    worst = _worst(result)
    if not worst:
        return None
    dataset = result.get("dataset") or {}
    pairs = [pair_figure(thumbnails, dataset, name, f"drift {readings.format_number(drift, 2)}")
             for name, drift in worst]
    maps = result.get("drift_maps") if isinstance(result.get("drift_maps"), dict) else {}
    by_name = {m.get("name"): m for m in maps.get("pairs") or [] if isinstance(m, dict)}
    for figure in pairs:  # the occlusion map over the cluttered view, when score stored one
        if figure["name"] in by_name:
            figure["map"] = thumbnails.overlay_uri(dataset, figure["name"], by_name[figure["name"]],
                                                    by_name[figure["name"]].get("patch") or maps.get("patch"))
    not_found = sum(not p["found"] for p in pairs)
    return {"pairs": pairs, "not_found": not_found, "root": str(thumbnails.root(dataset)),
            "maps": any(p.get("map") for p in pairs)}


def _layers(result: dict) -> dict | None:
    layers = result.get("layers")
    if not isinstance(layers, dict) or not layers:
        return None
    names = list(layers)
    series = {
        "domain accuracy": [metric_value(layers[n], "domain_classifier", "accuracy") for n in names],
        "mean relative drift": [metric_value(layers[n], "paired_drift", "relative_drift") for n in names],
        "CKA, debiased": [metric_value(layers[n], "cka") for n in names],
    }
    png = plots.line_profile(names, series, xlabel="layer (network order, input to output)",
                             ylabel="value (accuracy, drift, CKA)", title="Where invariance is lost",
                             reference=readings.CHANCE, reference_label="chance accuracy")
    rows = [(n, [cells.accuracy_cell(layers[n]), cells.drift_cell(layers[n]), cells.cka_cell(layers[n])])
            for n in names]
    return {"figure": figure(png, "per-layer profile"), "rows": rows}


def _level_key(value: str):
    # Numeric levels sort as numbers (2 before 10); text levels after them, by name.
    try:
        return (0, float(value), value)
    except ValueError:
        return (1, 0.0, value)


def _breakdown_figures(breakdowns: dict, columns: list[str], xlabel: str, zero_off: bool) -> list:
    """Domain accuracy and drift over the values of ``columns`` (factors share an axis, level has its own)."""
    levels = sorted({str(v) for c in columns for v in breakdowns[c]}, key=_level_key)
    ticks = [f"{v}\n(off, others on)" if zero_off and v == "0" else v for v in levels]
    figures = []
    for metric, key, ylabel in (("domain_classifier", "accuracy", plots.ACCURACY_LABEL),
                                ("paired_drift", "relative_drift", plots.DRIFT_LABEL)):
        series = {column: [_breakdown_value(breakdowns[column], level, metric, key) for level in levels]
                  for column in columns}
        chance = metric == "domain_classifier"
        png = plots.line_profile(ticks, series, xlabel=xlabel, ylabel=ylabel,
                                 title=f"{ylabel.split(' (')[0].capitalize()} by {xlabel.split(' (')[0]}",
                                 reference=readings.CHANCE if chance else None,
                                 reference_label="chance" if chance else None)
        figures.append(figure(png, f"breakdown of {key} by {xlabel}"))
    return figures


def _breakdowns(result: dict) -> dict | None:
    breakdowns = result.get("breakdowns")
    if not isinstance(breakdowns, dict) or not breakdowns:
        return None
    columns = [c for c, groups in breakdowns.items() if isinstance(groups, dict)]
    factors = [c for c in columns if c != "level"]
    figures = []
    if factors:
        figures += _breakdown_figures(breakdowns, factors, "factor severity (0 = this factor off, the others on)",
                                      zero_off=True)
    if "level" in columns:
        figures += _breakdown_figures(breakdowns, ["level"], "clutter level (every active factor)", zero_off=False)
    rows = []
    for factor in columns:
        groups = breakdowns[factor]
        for level in sorted(groups, key=lambda v: _level_key(str(v))):
            group = groups[level] if isinstance(groups[level], dict) else {}
            metrics = group.get("metrics") or {}
            off = factor != "level" and str(level) == "0"
            shown = f"{level} (this factor off, the others on)" if off else str(level)
            rows.append({"factor": str(factor), "level": shown, "pairs": readings.subgroup_size(group),
                         "cells": [cells.accuracy_cell(metrics), cells.drift_cell(metrics), cells.cka_cell(metrics),
                                   _adjusted_cell(metrics)]})
    return {"figures": [f for f in figures if f is not None], "rows": rows,
            "correction": _correction(result.get("breakdowns_correction")),
            "skipped": _skipped(result.get("breakdowns_skipped"))}


def _adjusted_cell(metrics: dict) -> dict:
    """The domain test's Holm-adjusted p-value beside the raw one."""
    found, reason = cells.entry(metrics, "domain_classifier")
    if found is None:
        return cells.missing_cell(reason or "not reported")
    raw, adjusted = found.get("p_value"), found.get("p_value_adjusted")
    if readings.finite(adjusted) is None:
        return cells.cell(readings.format_p_value(raw))
    reading = readings.Reading("differs after correction", "bad") if adjusted < readings.ALPHA else \
        readings.Reading("not significant after correction", "neutral")
    return cells.cell(readings.format_p_value(adjusted), reading, f"raw {readings.format_p_value(raw)}")


def _correction(stored) -> str | None:
    if not isinstance(stored, dict):
        return None
    tests = stored.get("tests") if isinstance(stored.get("tests"), dict) else {}
    counted = ", ".join(f"{k.replace('_', ' ')}: {v} subgroups" for k, v in tests.items())
    return (f"p-values adjusted by the {str(stored.get('method', '')).capitalize()} method across subgroups"
            f"{' (' + counted + ')' if counted else ''}; {stored.get('reference', '')}").strip("; ")


def _skipped(stored) -> list[str]:
    if not isinstance(stored, list):
        return []
    out = []
    for item in stored:
        if isinstance(item, dict):
            out.append(", ".join(f"{k} {v}" for k, v in item.items()))
        else:
            out.append(str(item))
    return out


def _breakdown_value(groups: dict, level: str, metric: str, key: str) -> float | None:
    group = groups.get(level)
    if not isinstance(group, dict):
        return None
    return metric_value(group.get("metrics") or {}, metric, key)


def _alignment(result: dict) -> dict | None:
    alignment = result.get("alignment")
    if not isinstance(alignment, dict):
        return None
    before = alignment.get("before") or {}
    after = alignment.get("after") or {}
    builders = (("Domain accuracy", cells.accuracy_cell), ("Proxy A-distance", cells.pad_cell),
                ("MMD\u00b2 (p; own bandwidth)", cells.mmd_cell), ("Mean relative drift", cells.drift_cell),
                ("Pair retrieval", cells.retrieval_cell), ("CKA, debiased", cells.cka_cell),
                ("Worst probe gap", cells.gap_cell))
    curves = alignment.get("curves") or {}
    png = plots.alignment_curves(curves) if isinstance(curves, dict) else None
    held_out = alignment.get("held_out_pairs")
    return {
        "rows": [(label, build(before), build(after)) for label, build in builders],
        "improved": alignment.get("improved") is not False,
        "cut_short": bool(alignment.get("cut_short")),
        "drift_fall": _drift_fall(alignment.get("drift_change")),
        "held_out": str(held_out) if held_out is not None else "the",
        "checkpoint": str(alignment["checkpoint"]) if alignment.get("checkpoint") else None,
        "figure": figure(png, "alignment training curves", "Training curves: domain accuracy, losses, \u03bb."),
    }


def _drift_fall(change) -> str | None:
    """The judged fall of the held-out drift with its paired interval, as one sentence."""
    if not isinstance(change, dict) or not isinstance(change.get("relative_fall_ci"), list):
        return None
    low, high = change["relative_fall_ci"]
    fall = change["relative_fall"]
    moved = f"fell by {fall:.1%}" if fall >= 0 else f"rose by {-fall:.1%}"
    return (f"The mean relative drift {moved} (relative fall {fall:.1%}, 95% interval {low:.1%} to "
            f"{high:.1%}, the same held-out pairs resampled before and after); a fall counts only when "
            "the interval lies above 0.")


def _gates(result: dict) -> list[dict] | None:
    stored = result.get("gates")
    if not isinstance(stored, dict) or not stored:
        return None
    rows = []
    for name, gate in stored.items():
        gate = gate if isinstance(gate, dict) else {}
        checks = gate.get("checks") if isinstance(gate.get("checks"), list) else [
            {"layer": gate.get("layer", (result.get("encoder") or {}).get("layer")), "task": gate.get("task"),
             "metric": name, "value": gate.get("value"), "bound": gate.get("bound"), "passed": gate.get("passed")}]
        for check in checks:
            check = check if isinstance(check, dict) else {}
            rows.append({"name": str(name), "threshold": readings.format_number(gate.get("threshold")),
                         "where": f"{check.get('metric', name)}{', ' + str(check['task']) if check.get('task') else ''}"
                                  f", layer {check.get('layer', readings.DASH)}",
                         "value": readings.format_number(check.get("value")),
                         "bound": readings.format_number(check.get("bound")) if check.get("bound") is not None
                         else str(check.get("reason", readings.DASH)),
                         "passed": bool(check.get("passed"))})
    return rows
