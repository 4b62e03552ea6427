"""What the commands print on stdout: the verdict, every scored layer, breakdowns, rankings, gates."""

from __future__ import annotations

from .. import SAFETY_CAUTION
from ._shared import say


def _table(rows, header) -> None:
    widths = [max(len(str(r[i])) for r in [header, *rows]) for i in range(len(header) - 1)]
    for row in [header, *rows]:
        say(("  ".join(str(c).ljust(w) for c, w in zip(row[:-1], widths)) + "  " + str(row[-1])).rstrip())


def _warnings_once(*groups) -> None:
    seen = set()
    for group in groups:
        for warning in group or []:
            if warning not in seen:
                seen.add(warning)
                say(f"warning: {warning}")


def print_summary(result) -> None:
    """One result: the verdict, a table per scored layer, breakdowns, warnings, gates, the caution."""
    from ..gates import scored_layers
    from ..readings import describe_metrics
    from ..results import aligned_on_same_pairs
    from ..verdict import plain, verdict

    enc = result.get("encoder", {})
    dataset = result["dataset"]
    pairs = dataset.get("pairs")
    frames = dataset.get("frames")
    size = (f"frames={frames}" if dataset.get("pairing") == "unpaired" and isinstance(frames, list)
            else f"pairs={pairs}")
    say(f"{enc.get('name') or enc.get('spec')}  headline layer={enc.get('layer')}  {size}")
    say(f"verdict: {plain(verdict([result]))}")
    layers = scored_layers(result)
    header = ("metric", "value", "95% interval", "reading")
    for layer, metrics in layers.items():
        if len(layers) > 1:
            say(f"layer {layer}:")
        _table(describe_metrics(metrics, pairs=pairs), header)
    print_breakdowns(result.get("breakdowns") or {})
    _warnings_once(result.get("warnings"), [w for w in [aligned_on_same_pairs(result)] if w])
    print_gates(result.get("gates") or {})
    say(f"note: {SAFETY_CAUTION}")


def print_gates(gates) -> None:
    """One line per gate check (metric, task, layer); a passed gate is followed by the caution."""
    from ..gates import gate_lines

    lines = gate_lines(gates)
    for _, line in lines:
        say(line)
    if any(passed for passed, _ in lines):
        say(f"caution: a passed gate is a regression check, not a safety function. {SAFETY_CAUTION}")


def print_breakdowns(breakdowns) -> None:
    """One line per factor: domain accuracy and mean relative drift at each value (dose-response)."""
    from ..readings import subgroup_size
    from ..results import metric_value

    for column, groups in breakdowns.items():
        if not isinstance(groups, dict):
            continue
        cells = []
        for value, group in groups.items():
            m = group.get("metrics", {}) if isinstance(group, dict) else {}
            acc = _fmt(metric_value(m, "domain_classifier", "accuracy"))
            drift = _fmt(metric_value(m, "paired_drift", "relative_drift"))
            cells.append(f"{value}: acc {acc}, drift {drift} (n={subgroup_size(group)})")
        off = " (0 = this factor off, the others on)" if str(column).startswith("factor_") else ""
        say(f"by {column}{off}: " + "; ".join(cells))


def print_ranking(comparison) -> None:
    """The ranked encoders as an aligned table, the verdict, failures, warnings and the caution."""
    from ..results import display_name
    from ..verdict import TASK_BASIS, plain, rank, verdict

    results = comparison["results"]
    if not results:
        for failure in comparison.get("failures", []):
            say(f"failed: {failure['name']}: {failure['error']}")
        say(f"note: {SAFETY_CAUTION}")
        return
    ranking = rank(results)
    rows = [_ranking_row(results[i], ranking, i) for i in ranking.order]
    _table(rows, ("rank", "encoder", "task information [95%]", "worst gap", "domain accuracy [95%]",
                  "mean drift", "CKA (debiased)", "label"))
    say("ranked by " + ("task information on cluttered views (mean skill over carried tasks); "
                        if ranking.basis == TASK_BASIS else "invariance (no task labels); ")
        + "'=' marks ranks shared because the 95% intervals overlap")
    say(f"verdict: {plain(verdict(results, ranking))}")
    for failure in comparison.get("failures", []):
        say(f"failed: {failure['name']}: {failure['error']}")
    result_warnings = [f"{display_name(r)}: {w}" for r in results for w in (r.get("warnings") or [])]
    _warnings_once(comparison.get("warnings"), result_warnings)
    say(f"note: {SAFETY_CAUTION}")


def _ranking_row(result, ranking, i) -> tuple:
    from ..readings import format_interval, format_number
    from ..results import display_name, metric_value
    from ..verdict import TASK_BASIS, worst_carried_gap

    m = result.get("metrics") or {}
    a = ranking.assessments[i]
    info = "no labels" if ranking.basis != TASK_BASIS else "n/a" if a.information is None else \
        f"{format_number(a.information.value)} {format_interval([a.information.low, a.information.high])}"
    worst = worst_carried_gap(m, ranking.carried)
    unit = "R2" if worst is not None and worst[1].get("metric") == "r2" else "acc"
    gap = "n/a" if worst is None else f"{format_number(worst[1].get('gap'))} {unit} on {worst[0]}"
    acc = metric_value(m, "domain_classifier", "accuracy")
    ci = (m.get("domain_classifier") or {}).get("ci") if isinstance(m.get("domain_classifier"), dict) else None
    dom = "n/a" if acc is None else f"{format_number(acc)} {format_interval(ci)}"
    return (ranking.shown_rank(i), display_name(result), info, gap, dom,
            _fmt(metric_value(m, "paired_drift", "relative_drift")), _fmt(metric_value(m, "cka")), a.label)


def print_alignment(result) -> None:
    """Where the checkpoint is, why training stopped, and before/after on the held-out pairs."""
    from ..results import metric_value

    al = result["alignment"]
    if al.get("checkpoint"):
        say(f"aligned checkpoint: {al['checkpoint']} (load it as checkpoint:{al['checkpoint']})")
    else:
        say(f"not improved: {al.get('outcome') or 'no kept state beat the original on the held-out pairs'}; "
            "no checkpoint was written")
    say(f"stopped: {al.get('stopped_because', 'step limit')}; kept the state of step {al.get('best_step', '?')} "
        f"(step 0 = the original encoder); measured on {al['held_out_pairs']} held-out pairs")
    if al.get("improved") is False and al.get("checkpoint"):
        say("note: the alignment did not improve on the original encoder on the held-out pairs; "
            "the checkpoint is not an aligned copy in any useful sense")
    if al.get("cut_short"):
        say("note: training was cut short (time limit or interruption) before its planned steps")
    rows = [("domain accuracy", "domain_classifier", "accuracy"),
            ("mean drift", "paired_drift", "relative_drift"), ("CKA (debiased)", "cka", None)]
    for label, group, key in rows:
        before, after = metric_value(al["before"], group, key), metric_value(al["after"], group, key)
        say(f"  {label:<16} before {_fmt(before)}  after {_fmt(after)}")
    change = al.get("drift_change") or {}
    if change.get("relative_fall_ci"):
        low, high = change["relative_fall_ci"]
        say(f"  {'drift fall':<16} {change['relative_fall']:.1%} (95% interval {low:.1%} to {high:.1%}, "
            "the same held-out pairs resampled together)")
    for name, probe in al["after"].get("probe", {}).items():
        b = al["before"].get("probe", {}).get(name, {})
        if "clean" in probe and "clean" in b:
            say(f"  probe {name:<10} clean {b['clean']:.3f} -> {probe['clean']:.3f}   "
                f"cluttered {b['cluttered']:.3f} -> {probe['cluttered']:.3f}")
    say(f"note: {SAFETY_CAUTION}")


def _fmt(value, digits: int = 3) -> str:
    return "n/a" if value is None else f"{value:.{digits}f}"
