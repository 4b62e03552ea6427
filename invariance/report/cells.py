"""Table cells of the report: a metric's value, interval and reading, or why it is missing.

A cell is a plain dict for the templates: ``value``, ``interval``, ``reading`` and
``tone`` (all strings), and ``missing`` (the reason, or ``None``). The words come from
:mod:`invariance.readings`, the same functions the terminal table uses.
"""

from __future__ import annotations

from invariance import readings
from invariance.results import metric_value


def cell(value: str, reading: readings.Reading | None = None, interval: str = "") -> dict:
    """A cell showing ``value`` with an optional interval and reading."""
    return {"value": value, "interval": interval, "reading": reading.words if reading else "",
            "tone": reading.tone if reading else "", "missing": None}


def missing_cell(reason: str) -> dict:
    """A cell that says why the number is not there."""
    return {"value": "", "interval": "", "reading": "", "tone": "", "missing": reason}


def entry(metrics: dict, name: str):
    """``(entry, reason)``: the metric's stored object, or ``None`` with why it is missing."""
    found = metrics.get(name) if isinstance(metrics, dict) else None
    if found is None:
        reasons = metrics.get("not_computed") if isinstance(metrics, dict) else None
        if isinstance(reasons, dict) and name in reasons:
            return None, f"not computed: {reasons[name]}"
        return None, "not reported"
    if isinstance(found, dict) and "not_computable" in found:
        return None, f"not computable: {found['not_computable']}"
    if not isinstance(found, (dict, int, float)):
        return None, "unreadable value in the result file"
    return found, None


def ci(metrics: dict, metric: str, key: str) -> tuple[float, float] | None:
    """The readable 95% interval ``metrics[metric][key]``, or ``None``."""
    found, _ = entry(metrics, metric)
    return readings.interval(found.get(key)) if isinstance(found, dict) else None


def accuracy_cell(metrics: dict) -> dict:
    """Held-out domain accuracy with its interval and reading."""
    found, reason = entry(metrics, "domain_classifier")
    accuracy = metric_value(metrics, "domain_classifier", "accuracy")
    if found is None or accuracy is None:
        return missing_cell(reason or "not reported")
    interval = ci(metrics, "domain_classifier", "ci")
    reading = readings.read_domain_accuracy(accuracy, interval, small_sample=bool(found.get("small_sample")),
                                            sample=readings.domain_sample(found))
    return cell(readings.format_number(accuracy), reading, readings.format_interval(interval))


def pad_cell(metrics: dict) -> dict:
    """Proxy A-distance with its reading."""
    found, reason = entry(metrics, "domain_classifier")
    distance = metric_value(metrics, "domain_classifier", "proxy_a_distance")
    if found is None or distance is None:
        return missing_cell(reason or "not reported")
    return cell(readings.format_number(distance), readings.read_proxy_a_distance(distance))


def mmd_cell(metrics: dict) -> dict:
    """MMD squared with its permutation p-value and reading."""
    found, reason = entry(metrics, "mmd")
    value = metric_value(metrics, "mmd", "mmd2")
    if found is None or value is None:
        return missing_cell(reason or "not reported")
    p_value = found.get("p_value")
    return cell(readings.format_number(value, 4), readings.read_mmd(p_value), readings.format_p_value(p_value))


def drift_cell(metrics: dict) -> dict:
    """Relative drift with its interval and reading."""
    found, reason = entry(metrics, "paired_drift")
    drift = metric_value(metrics, "paired_drift", "relative_drift")
    if found is None or drift is None:
        return missing_cell(reason or "not reported")
    interval = readings.format_interval(ci(metrics, "paired_drift", "relative_drift_ci"))
    return cell(readings.format_number(drift), readings.read_relative_drift(drift), interval)


def retrieval_cell(metrics: dict) -> dict:
    """Top-1 pair retrieval with its reading."""
    found, reason = entry(metrics, "paired_drift")
    top1 = metric_value(metrics, "paired_drift", "pair_retrieval_top1")
    if found is None or top1 is None:
        return missing_cell(reason or "not reported")
    return cell(readings.format_number(top1), readings.read_pair_retrieval(top1))


def cka_cell(metrics: dict) -> dict:
    """Debiased CKA with its reading."""
    _, reason = entry(metrics, "cka")
    value = metric_value(metrics, "cka")
    if value is None:
        return missing_cell(reason or "not reported")
    return cell(readings.format_number(value), readings.read_cka(value))


def probe_entries(metrics: dict) -> tuple[list[tuple[str, dict | None, str | None]], str | None]:
    """Each probe label with its entry (or the reason it is missing), or one reason for all."""
    probes, reason = entry(metrics, "probe")
    if probes is None:
        return [], reason
    if not isinstance(probes, dict) or not probes:
        return [], "no label columns to probe"
    entries = []
    for task, found in probes.items():
        if isinstance(found, dict) and "not_computable" in found:
            entries.append((task, None, f"not computable: {found['not_computable']}"))
        elif isinstance(found, dict):
            entries.append((task, found, None))
    return entries, None


def worst_gap(metrics: dict) -> tuple[str, float] | None:
    """``(label, gap)`` of the decodable probe that loses most under clutter, or ``None``.

    Tasks not decodable on clean are left out; accuracy and R^2 gaps are compared by the
    upper end of their intervals (see :func:`invariance.verdict.worst_carried_gap`).
    """
    from invariance.verdict import worst_carried_gap

    worst = worst_carried_gap(metrics)
    if worst is None:
        return None
    gap = readings.finite(worst[1].get("gap"))
    return None if gap is None else (worst[0], gap)


def gap_cell(metrics: dict) -> dict:
    """The worst decodable probe gap, naming its label and unit, with its interval."""
    from invariance.verdict import worst_carried_gap

    worst = worst_carried_gap(metrics)
    if worst is None:
        entries, reason = probe_entries(metrics)
        if entries and all(found is not None and not readings.probe_decodable(found) for _, found, _ in entries):
            return cell("", readings.Reading(readings.NOT_DECODABLE + " (every label)", "neutral"))
        reasons = [why for _, _, why in entries if why]
        return missing_cell(reason or (reasons[0] if reasons else "no probe"))
    task, found = worst
    interval = readings.format_interval(found.get("gap_ci"))
    return cell(f"{readings.format_number(found.get('gap'))} {readings.gap_unit(found)}",
                readings.read_probe(found), f"on {task} {interval}".strip())


def information_cell(assessment) -> dict:
    """Task information on cluttered views (an :class:`invariance.verdict.Assessment`)."""
    if assessment.collapsed:
        return cell("", readings.Reading("collapsed: constant features", "bad"))
    info = assessment.information
    if info is None:
        return missing_cell("no decodable task label")
    reading = readings.read_task_information(info.value)
    if assessment.label and assessment.label not in reading.words:
        reading = readings.Reading(f"{reading.words}; {assessment.label}", "bad")
    return cell(readings.format_number(info.value), reading,
                f"[{readings.format_number(info.low)}, {readings.format_number(info.high)}]")


def gates(result: dict) -> tuple[list[str], list[str]]:
    """Names of the gates met and of those failed."""
    stored = result.get("gates") or {}
    met = [name for name, g in stored.items() if isinstance(g, dict) and g.get("passed")]
    failed = [name for name, g in stored.items() if isinstance(g, dict) and not g.get("passed")]
    return met, failed


def gates_cell(result: dict) -> dict:
    """How many gates failed, naming them, or that all were met."""
    met, failed = gates(result)
    if not met and not failed:
        return cell("none set")
    if failed:
        return cell(f"{len(failed)} of {len(met) + len(failed)} failed", readings.Reading(", ".join(failed), "bad"))
    return cell(f"all {len(met)} met")


def metric_rows(metrics: dict) -> list[tuple[str, str, dict]]:
    """``(label, note anchor, cell)`` for the six whole-data-set metrics, in report order."""
    notes = readings.NOTE_ANCHORS
    return [
        ("Domain accuracy [95% interval]", notes["domain_accuracy"], accuracy_cell(metrics)),
        ("Proxy A-distance", notes["proxy_a_distance"], pad_cell(metrics)),
        ("MMD\u00b2 (p; own bandwidth)", notes["mmd"], mmd_cell(metrics)),
        ("Mean relative drift [95% interval]", notes["relative_drift"], drift_cell(metrics)),
        ("Pair retrieval (top-1)", notes["pair_retrieval"], retrieval_cell(metrics)),
        ("CKA, debiased", notes["cka"], cka_cell(metrics)),
    ]
