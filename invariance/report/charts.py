"""The charts that compare encoders, as figure dicts for the templates.

A figure is ``{"uri", "alt", "caption"}`` with the PNG embedded as a ``data:`` URI, or
``None`` when there is nothing to draw (the templates skip it).
"""

from __future__ import annotations

from invariance import readings
from invariance.report import cells, plots
from invariance.results import metric_value


def figure(png: bytes | None, alt: str, caption: str = "") -> dict | None:
    """A figure dict for ``png``, or ``None`` when the chart was not drawn."""
    if png is None:
        return None
    return {"uri": plots.to_data_uri(png), "alt": alt, "caption": caption}


def comparison_figures(labels: list[str], metrics: list[dict], information: list | None = None) -> list[dict]:
    """Task information, accuracy, drift, CKA, MMD and one probe chart per label, in rank order.

    Parameters
    ----------
    labels : list of str
        Encoder names in rank order.
    metrics : list of dict
        Each encoder's ``metrics`` object, in the same order.
    information : list of invariance.verdict.Assessment, optional
        Each encoder's assessment, for the task-information chart.

    Returns
    -------
    list of dict
        Figure dicts; charts with nothing to draw are left out.
    """
    figures = [
        _information_chart(labels, information),
        _accuracy_chart(labels, metrics),
        _drift_chart(labels, metrics),
        _cka_chart(labels, metrics),
        _mmd_chart(labels, metrics),
        *_probe_charts(labels, metrics),
    ]
    return [f for f in figures if f is not None]


def _information_chart(labels, information) -> dict | None:
    if not information or all(a.information is None for a in information):
        return None
    values = [None if a.information is None else a.information.value for a in information]
    intervals = [None if a.information is None else (a.information.low, a.information.high) for a in information]
    png = plots.bar_with_intervals(labels, values, intervals, ylabel=plots.INFORMATION_LABEL,
                                   title="Task information on cluttered views (higher is better; ranks)",
                                   ylim=(0, 1.05))
    return figure(png, "task information on cluttered views per encoder",
                  "Mean skill over the tasks some encoder decodes on clean; this is what the ranking uses.")


def _cka_chart(labels, metrics) -> dict | None:
    values = [metric_value(m, "cka") for m in metrics]
    low = min([v for v in values if v is not None] + [0.0])
    png = plots.bar_with_intervals(labels, values, ylabel=plots.CKA_LABEL, title="CKA (debiased), clean vs cluttered",
                                   ylim=(min(0.0, low - 0.05), 1.05))
    return figure(png, "CKA per encoder")


def _accuracy_chart(labels, metrics) -> dict | None:
    values = [metric_value(m, "domain_classifier", "accuracy") for m in metrics]
    intervals = [cells.ci(m, "domain_classifier", "ci") for m in metrics]
    png = plots.bar_with_intervals(labels, values, intervals, ylabel=plots.ACCURACY_LABEL,
                                   title="Domain classifier accuracy (lower is better)",
                                   reference=readings.CHANCE, reference_label="chance (0.5)", ylim=(0, 1.05))
    return figure(png, "domain accuracy per encoder")


def _drift_chart(labels, metrics) -> dict | None:
    values = [metric_value(m, "paired_drift", "relative_drift") for m in metrics]
    intervals = [cells.ci(m, "paired_drift", "relative_drift_ci") for m in metrics]
    png = plots.bar_with_intervals(labels, values, intervals, ylabel=plots.DRIFT_LABEL,
                                   title="Mean relative drift over pairs (lower is better)")
    return figure(png, "relative drift per encoder")


def _mmd_chart(labels, metrics) -> dict | None:
    values = [metric_value(m, "mmd", "mmd2") for m in metrics]
    notes = [readings.format_p_value((m.get("mmd") or {}).get("p_value")) if v is not None else ""
             for m, v in zip(metrics, values)]
    png = plots.bar_with_intervals(labels, values, ylabel=plots.MMD_LABEL,
                                   title="MMD\u00b2 with permutation p-value",
                                   annotations=notes)
    return figure(png, "MMD squared per encoder",
                  "Each encoder's kernel bandwidth is the median distance of its own features, so the bar heights "
                  "are not on one scale: compare the p-values, not the heights.")


def _probe_charts(labels, metrics) -> list[dict | None]:
    tasks: dict[str, str] = {}
    for m in metrics:
        for task, found, _ in cells.probe_entries(m)[0]:
            if found is not None:
                tasks.setdefault(task, str(found.get("metric") or "score"))
    figures = []
    for task, metric in tasks.items():
        clean, cluttered = [], []
        for m in metrics:
            found = {t: e for t, e, _ in cells.probe_entries(m)[0]}.get(task)
            clean.append(readings.finite(found.get("clean")) if found else None)
            cluttered.append(readings.finite(found.get("cluttered")) if found else None)
        png = plots.probe_chart(labels, clean, cluttered, task=task, metric=metric)
        figures.append(figure(png, f"probe {task} clean vs cluttered"))
    return figures
