"""Gates: user-set thresholds a result must meet (the command line exits 3 when one fails).

A gate decides on the 95% interval's bound in the unsafe direction, not on the point
estimate: a domain accuracy of 0.68 [0.55, 0.80] does not pass ``max_domain_accuracy =
0.7``, because the data do not rule out 0.80. Every scored layer is checked (a result's
``layers``, or its headline ``metrics``), every probe gap on its own task and in its own
unit (accuracy gaps and R^2 gaps are never maxed together), and each check names its
metric, task and layer. Gates fail closed: a measure that is not computable, a missing
interval bound, or collapsed (constant) features fail.

The gates are a regression check for an engineering pipeline, not a safety function;
:data:`invariance.SAFETY_CAUTION` is printed with every gate line.
"""

from __future__ import annotations

from invariance import readings
from invariance.errors import GateFailed, InvalidParameter
from invariance.options import Gates
from invariance.verdict import collapse_reason

# Gate name -> (metric, key of the point value, key of its 95% interval, words). A gate
# fails when the interval's upper end is above its threshold.
GATE_METRICS = {
    "max_domain_accuracy": ("domain_classifier", "accuracy", "ci", "domain accuracy"),
    "max_relative_drift": ("paired_drift", "relative_drift", "relative_drift_ci", "mean relative drift"),
    "max_probe_gap": ("probe", "gap", "gap_ci", "probe gap"),
}

DECIDED_ON = "upper end of the 95% interval (the unsafe direction); a point estimate without an interval fails"


def probe_gap(metrics: dict) -> float | None:
    """The largest clean-minus-cluttered gap over decodable probes, or ``None``.

    Kept for callers of earlier versions; it maxes gaps of one unit only when all probes
    share it. Gates use :func:`evaluate_gates`, which checks every task on its own.
    """
    from invariance.verdict import worst_carried_gap

    worst = worst_carried_gap(metrics)
    return None if worst is None else readings.finite(worst[1].get("gap"))


def scored_layers(result: dict) -> dict:
    """``{layer: metrics}`` for every scored layer: ``layers``, or the headline metrics."""
    layers = result.get("layers")
    if isinstance(layers, dict) and layers:
        return {str(k): v if isinstance(v, dict) else {} for k, v in layers.items()}
    layer = (result.get("encoder") or {}).get("layer") if isinstance(result.get("encoder"), dict) else None
    return {str(layer or "output"): result.get("metrics") if isinstance(result.get("metrics"), dict) else {}}


def _check(layer: str, task: str | None, words: str, entry, key: str, ci_key: str, threshold: float,
           collapsed: str | None) -> dict:
    """One gate check of one layer (and task)."""
    out = {"layer": layer, "task": task, "metric": words, "value": None, "bound": None, "passed": False}
    if collapsed:
        out["reason"] = f"collapsed features ({collapsed})"
        return out
    if not isinstance(entry, dict) or "not_computable" in entry:
        why = entry.get("not_computable") if isinstance(entry, dict) else "not reported"
        out["reason"] = f"not computable: {why}"
        return out
    value = readings.finite(entry.get(key))
    ci = readings.interval(entry.get(ci_key))
    out["value"] = value
    if value is None or ci is None:
        out["reason"] = "no 95% interval to decide on"
        return out
    out["bound"] = ci[1]
    out["passed"] = bool(ci[1] <= threshold)
    return out


def _layer_checks(name: str, layer: str, metrics: dict, threshold: float, collapsed: str | None,
                  not_computed: dict) -> list[dict]:
    group, key, ci_key, words = GATE_METRICS[name]
    if group != "probe" or collapsed:
        entry = metrics.get(group)
        if entry is None and isinstance(not_computed.get(group), str):
            entry = {"not_computable": not_computed[group]}  # e.g. drift of unpaired domains, with its reason
        return [_check(layer, None, words, entry, key, ci_key, threshold, collapsed)]
    probes = metrics.get("probe")
    if not isinstance(probes, dict) or "not_computable" in probes or not probes:
        return [_check(layer, None, words, probes if isinstance(probes, dict) and probes else None,
                       key, ci_key, threshold, collapsed)]
    checks = []
    for task, entry in probes.items():
        if isinstance(entry, dict) and "not_computable" not in entry and not readings.probe_decodable(entry):
            continue  # "not decodable on clean": no task to lose, left out of the gate
        unit = readings.gap_unit(entry) if isinstance(entry, dict) else ""
        checks.append(_check(layer, str(task), f"{words} ({unit})" if unit else words, entry, key, ci_key,
                             threshold, collapsed))
    if not checks:
        checks.append({"layer": layer, "task": None, "metric": words, "value": None, "bound": None,
                       "passed": False, "reason": "no task is decodable on clean, so nothing shows it is kept"})
    return checks


def evaluate_gates(result: dict, gates: Gates | None) -> dict:
    """Check every scored layer of ``result`` against the gates that are set.

    Parameters
    ----------
    result : dict
        A result with a ``metrics`` object (and ``layers`` when several were scored).
    gates : Gates or None

    Returns
    -------
    dict
        The ``gates`` object ``{name: {"threshold", "value", "passed", "bound", "layer",
        "task", "decided_on", "checks"}}``: ``passed`` when every check passed; ``value``
        and ``bound`` (the deciding upper end of the 95% interval), ``layer`` and ``task``
        from the worst check (a failed one first); ``checks`` one per layer (and task),
        each ``{"layer", "task", "metric", "value", "bound", "passed"}`` with ``reason``
        when it failed without a bound.
    """
    if gates is None:
        return {}
    if not isinstance(gates, Gates):
        raise InvalidParameter("gates", f"gates={gates!r} is not valid; pass a Gates")
    collapsed = {layer: collapse_reason(m, result.get("warnings") or ()) for layer, m in scored_layers(result).items()}
    not_computed = result.get("not_computed") if isinstance(result.get("not_computed"), dict) else {}
    out = {}
    for name, threshold in gates.thresholds().items():
        checks = []
        for layer, metrics in scored_layers(result).items():
            checks += _layer_checks(name, layer, metrics, float(threshold), collapsed[layer], not_computed)
        worst = min(checks, key=lambda c: (c["passed"], -(c["bound"] if c["bound"] is not None else float("inf"))))
        out[name] = {"threshold": float(threshold), "value": worst["value"], "passed": all(c["passed"] for c in checks),
                     "bound": worst["bound"], "layer": worst["layer"], "task": worst["task"],
                     "decided_on": DECIDED_ON, "checks": checks}
    return out


def _where(check: dict) -> str:
    task = f", task {check['task']}" if check.get("task") else ""
    return f"{check.get('metric', '?')}{task}, layer {check.get('layer', '?')}"


def gate_lines(gates: dict) -> list[tuple[bool, str]]:
    """One ``(passed, line)`` per gate check, naming gate, metric, task and layer."""
    lines = []
    for name, gate in (gates or {}).items():
        if not isinstance(gate, dict):
            continue
        checks = gate.get("checks") or [{"metric": name, "layer": gate.get("layer", "?"), "task": gate.get("task"),
                                         "value": gate.get("value"), "bound": gate.get("bound", gate.get("value")),
                                         "passed": gate.get("passed")}]
        for check in checks:
            if check.get("passed"):
                lines.append((True, f"gate passed: {name} {gate.get('threshold')}: {_where(check)}: 95% upper end "
                                    f"{readings.format_number(check.get('bound'))} <= {gate.get('threshold')}"))
            elif check.get("bound") is not None:
                lines.append((False, f"gate failed: {name} {gate.get('threshold')}: {_where(check)}: 95% upper end "
                                     f"{readings.format_number(check['bound'])} > {gate.get('threshold')} "
                                     f"(point {readings.format_number(check.get('value'))})"))
            else:
                lines.append((False, f"gate failed: {name} {gate.get('threshold')}: {_where(check)}: "
                                     f"{check.get('reason', 'not computable')}"))
    return lines


def raise_for_gates(gates: dict) -> None:
    """Raise :class:`GateFailed` naming every gate that was not met, with layer and task."""
    failed = []
    for name, gate in (gates or {}).items():
        if not isinstance(gate, dict) or gate.get("passed"):
            continue
        where = f"layer {gate.get('layer')}" + (f", task {gate['task']}" if gate.get("task") else "")
        bound = gate.get("bound")
        if bound is None:
            reason = next((c.get("reason") for c in gate.get("checks") or [] if not c.get("passed")), None)
            failed.append(f"{name} ({where}: {reason or 'not computable'})")
        else:
            failed.append(f"{name} ({where}: 95% upper end {round(bound, 4)} > {gate.get('threshold')})")
    if failed:
        raise GateFailed("gate not met: " + "; ".join(failed))
