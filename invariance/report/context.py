"""The context of the whole report page: plain dicts and lists of formatted strings.

Nothing here writes markup; the templates under ``templates/`` do, with autoescaping,
so every name, path and message from a result file reaches the page as text.
"""

from __future__ import annotations

import datetime as _dt

import invariance
from invariance import readings
from invariance.report import cells
from invariance.report.charts import comparison_figures
from invariance.report.encoder import as_list, drift_values, encoder_section, pair_figure
from invariance.report.thumbnails import Thumbnails
from invariance import verdict as _verdict_rules
from invariance.results import aligned_on_same_pairs, check_same_dataset, display_name

# Example pairs shown per data set: a glimpse of what clean and cluttered mean here
# (common practice).
EXAMPLE_PAIRS = 3

_ENV_KEYS = ("invariance", "python", "torch", "torchvision", "numpy", "scikit-learn", "platform",
             "device", "seed", "command")


def page_context(comparison: dict, *, title: str | None, thumbnails: Thumbnails, tsne: bool) -> dict:
    """Everything the ``report`` template needs.

    Parameters
    ----------
    comparison : dict
        From :func:`invariance.results.make_comparison`: ``results``, ``failures``,
        ``warnings``.
    title : str or None
        Page title; by default it names the encoders.
    thumbnails : Thumbnails
        Reader of the data set images.
    tsne : bool
        Whether a t-SNE view was asked for.

    Returns
    -------
    dict
        One entry per section of the page.
    """
    results = comparison["results"]
    ranking = _verdict_rules.rank(results)
    order = ranking.order
    rank = {i: ranking.shown_rank(i) for i in order}
    names = [display_name(r) for r in results]
    datasets = _datasets(results)
    today = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    return {
        "title": title or _default_title(results),
        "date": today,
        "version": invariance.__version__,
        "caution_text": invariance.SAFETY_CAUTION,
        "datasets": [{"path": str(d["path"]), "pairs": str(d["pairs"])} for d in datasets],
        "encoder_count": len(results),
        "warnings": _warnings(comparison["warnings"], results),
        "nav": [(f"encoder-{i}", f"{rank[i]} {names[i]}") for i in order],
        "summary": _summary(results, ranking, names),
        "charts": comparison_figures([names[i] for i in order],
                                     [results[i].get("metrics") or {} for i in order],
                                     information=[ranking.assessments[i] for i in order]) if results else None,
        "encoders": [encoder_section(results[i], index=i, rank=rank[i], name=names[i], thumbnails=thumbnails,
                                     tsne=tsne) for i in order],
        "failures": [{k: str(f[k]) for k in ("name", "spec", "error")} for f in comparison["failures"]],
        "data": [_dataset_block(d, thumbnails) for d in datasets],
        "environment": _environment([results[i] for i in order], [names[i] for i in order]),
    }


def _default_title(results: list[dict]) -> str:
    if len(results) == 1:
        return f"Clutter invariance of {display_name(results[0])}"
    return f"Clutter invariance: {len(results)} encoders compared"


def _warnings(warnings: list[str], results: list[dict]) -> list[str]:
    """Run-level and per-encoder warnings, each once."""
    items = [str(w) for w in warnings]
    for result in results:
        items += [f"{display_name(result)}: {w}" for w in as_list(result.get("warnings"))]
        overlap = aligned_on_same_pairs(result)
        if overlap:
            items.append(overlap)
    return list(dict.fromkeys(items))


def _datasets(results: list[dict]) -> list[dict]:
    seen: dict[tuple, dict] = {}
    for result in results:
        dataset = result.get("dataset") or {}
        key = (str(dataset.get("content_hash")), str(dataset.get("path")), str(dataset.get("pairs")))
        found = seen.setdefault(key, {**dataset, "path": dataset.get("path", "unknown"),
                                      "pairs": dataset.get("pairs", "?"), "users": [], "first": result})
        found["users"].append(display_name(result))
    return list(seen.values())


# ---------------------------------------------------------------- summary

def _summary(results: list[dict], ranking, names: list[str]) -> dict | None:
    if not results:
        return None
    rows = []
    for i in ranking.order:
        metrics = results[i].get("metrics") or {}
        assessment = ranking.assessments[i]
        rows.append({
            "index": i, "rank": ranking.shown_rank(i), "name": names[i], "label": assessment.label,
            "spec": str((results[i].get("encoder") or {}).get("spec", "")),
            "cells": [cells.information_cell(assessment), cells.gap_cell(metrics), cells.accuracy_cell(metrics),
                      cells.pad_cell(metrics), cells.mmd_cell(metrics), cells.drift_cell(metrics),
                      cells.retrieval_cell(metrics), cells.cka_cell(metrics), cells.gates_cell(results[i])],
        })
    return {"verdict": _verdict(results, ranking, names), "rows": rows,
            "basis": ranking.basis, "task_basis": ranking.basis == _verdict_rules.TASK_BASIS,
            "carried": ", ".join(ranking.carried), "floor": readings.format_number(_verdict_rules.SKILL_FLOOR, 1)}


def _text(text: str, strong: bool = False) -> dict:
    return {"text": text, "strong": strong}


def _verdict(results: list[dict], ranking, names: list[str]) -> list[list[dict]]:
    """The verdict of :func:`invariance.verdict.verdict` plus the gates and data set remarks.

    Sentences are lists of ``{"text", "strong"}`` pieces so that the template, not this
    code, decides which words are set in bold.
    """
    sentences = [[_text(text, strong) for text, strong in sentence]
                 for sentence in _verdict_rules.verdict(results, ranking, names)]
    failed = [names[i] for i in ranking.order if cells.gates(results[i])[1]]
    if failed:
        sentences.append([_text(f"Gates failed for: {', '.join(failed)}.")])
    if len(results) > 1 and check_same_dataset(results):
        sentences.append([_text("The encoders were measured on different data sets", strong=True),
                          _text(" (see Warnings), so this ranking is not a like-for-like comparison.")])
    return sentences


# ---------------------------------------------------------------- closing sections

def _dataset_block(dataset: dict, thumbnails: Thumbnails) -> dict:
    size = dataset.get("image_size")
    facts = [
        ("Folder", dataset.get("path")), ("Pairs", dataset.get("pairs")),
        ("Image size (px)", f"{size[0]} \u00d7 {size[1]}" if isinstance(size, list) and len(size) == 2 else None),
        ("Clutter factors", ", ".join(map(str, dataset.get("factors") or [])) or None),
        ("Content hash", dataset.get("content_hash")), ("Used by", ", ".join(dataset["users"])),
    ]
    names = [n for n, _ in drift_values(dataset["first"])][:EXAMPLE_PAIRS]
    pairs = [pair_figure(thumbnails, dataset, name, "") for name in names]
    return {"facts": [(k, str(v)) for k, v in facts if v is not None], "pairs": pairs,
            "any_found": any(p["found"] for p in pairs), "root": str(thumbnails.root(dataset))}


def _environment(results: list[dict], names: list[str]) -> dict | None:
    if not results:
        return None
    envs = [r.get("environment") or {} for r in results]
    keys = [k for k in _ENV_KEYS if any(k in env for env in envs)]
    keys += sorted({k for env in envs for k in env if k not in _ENV_KEYS and k != "timings_s"})
    rows = [(k, [str(env.get(k, readings.DASH)) for env in envs]) for k in keys]
    return {"names": names, "rows": rows, "timings": [_timings(env) for env in envs]}


def _timings(env: dict) -> str:
    timings = env.get("timings_s") or {}
    if not isinstance(timings, dict) or not timings:
        return readings.DASH
    return ", ".join(f"{k} {readings.format_number(v, 1)}" for k, v in timings.items())
