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
    reading = readings.read_domain_accuracy(accuracy, interval, small_sample=bool(found.get("small_sample")))
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
    """Linear CKA with its reading."""
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
    """``(label, gap)`` of the probe that loses most under clutter, or ``None``."""
    entries, _ = probe_entries(metrics)
    gaps = [(task, readings.finite(found.get("gap"))) for task, found, _ in entries if found is not None]
    gaps = [(task, gap) for task, gap in gaps if gap is not None]
    return max(gaps, key=lambda item: item[1]) if gaps else None


def gap_cell(metrics: dict) -> dict:
    """The worst probe gap, naming its label."""
    worst = worst_gap(metrics)
    if worst is None:
        entries, reason = probe_entries(metrics)
        reasons = [why for _, _, why in entries if why]
        return missing_cell(reason or (reasons[0] if reasons else "no probe"))
    task, gap = worst
    return cell(readings.format_number(gap), readings.read_probe_gap(gap), f"on {task}")


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


def metric_rows(metrics: dict) -> list[tuple[str, dict]]:
    """``(label, cell)`` for the six whole-data-set metrics, in the order the report shows them."""
    return [
        ("Domain accuracy [95% interval]", accuracy_cell(metrics)),
        ("Proxy A-distance", pad_cell(metrics)),
        ("MMD\u00b2 (p)", mmd_cell(metrics)),
        ("Relative drift [95% interval]", drift_cell(metrics)),
        ("Pair retrieval (top-1)", retrieval_cell(metrics)),
        ("CKA", cka_cell(metrics)),
    ]
