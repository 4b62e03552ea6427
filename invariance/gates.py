"""Gates: user-set thresholds a result must meet (the command line exits 3 when one fails)."""

from __future__ import annotations

from .errors import GateFailed, InvalidParameter
from .options import Gates

# Gate name -> (metric, key) in the result's metrics; a gate fails when the value is
# above its threshold. ``None`` as key: the largest probe gap over labels.
GATE_METRICS = {
    "max_domain_accuracy": ("domain_classifier", "accuracy"),
    "max_relative_drift": ("paired_drift", "relative_drift"),
    "max_probe_gap": ("probe", None),
}


def probe_gap(metrics: dict) -> float | None:
    """The largest clean-minus-cluttered probe gap over labels, or None without probes."""
    gaps = [p["gap"] for p in metrics.get("probe", {}).values() if isinstance(p, dict) and "gap" in p]
    return max(gaps) if gaps else None


def evaluate_gates(result: dict, gates: Gates | None) -> dict:
    """Compare the result's metrics against the gates that are set.

    Parameters
    ----------
    result : dict
        A result with a ``metrics`` object.
    gates : Gates or None

    Returns
    -------
    dict
        The ``gates`` object ``{name: {"threshold", "value", "passed"}}``; a gate whose
        metric is not computable fails, since nothing shows the encoder meets it.
    """
    if gates is None:
        return {}
    if not isinstance(gates, Gates):
        raise InvalidParameter("gates", f"gates={gates!r} is not valid; pass a Gates")
    metrics = result["metrics"]
    out = {}
    for name, threshold in gates.thresholds().items():
        group, key = GATE_METRICS[name]
        value = probe_gap(metrics) if key is None else metrics.get(group, {}).get(key)
        passed = value is not None and value <= threshold
        out[name] = {"threshold": float(threshold), "value": value, "passed": bool(passed)}
    return out


def raise_for_gates(gates: dict) -> None:
    """Raise :class:`GateFailed` naming every gate that was not met."""
    failed = [
        f"{name} (value {g['value'] if g['value'] is None else round(g['value'], 4)} > {g['threshold']})"
        for name, g in gates.items()
        if not g["passed"]
    ]
    if failed:
        raise GateFailed("gate not met: " + "; ".join(failed))
