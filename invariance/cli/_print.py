"""What the commands print on stdout: the metrics table, breakdowns, rankings, alignment."""

from __future__ import annotations


from .. import SAFETY_CAUTION
from ._shared import say


def print_summary(result) -> None:
    """The metrics of one result as a table with plain readings, then warnings and the caution."""
    from ..readings import describe_metrics

    rows = describe_metrics(result["metrics"])
    enc = result.get("encoder", {})
    say(f"{enc.get('name') or enc.get('spec')}  layer={enc.get('layer')}  pairs={result['dataset']['pairs']}")
    header = ("metric", "value", "95% interval", "reading")
    widths = [max(len(str(r[i])) for r in [header, *rows]) for i in range(3)]
    for row in [header, *rows]:
        say("  ".join(str(c).ljust(w) for c, w in zip(row[:3], widths)) + "  " + str(row[3]))
    print_breakdowns(result.get("breakdowns") or {})
    for warning in result.get("warnings", []):
        say(f"warning: {warning}")
    say(f"note: {SAFETY_CAUTION}")


def print_breakdowns(breakdowns) -> None:
    """One line per factor: domain accuracy and relative drift at each value (dose-response)."""
    from ..results import metric_value

    for column, groups in breakdowns.items():
        cells = []
        for value, group in groups.items():
            m = group.get("metrics", {})
            acc = _fmt(metric_value(m, "domain_classifier", "accuracy"), 2)
            drift = _fmt(metric_value(m, "paired_drift", "relative_drift"), 2)
            cells.append(f"{value}: acc {acc}, drift {drift} (n={group.get('pairs')})")
        say(f"by {column}: " + "; ".join(cells))


def print_ranking(comparison) -> None:
    """The ranked encoders as an aligned table, then failures, warnings and the caution."""
    from ..results import display_name, metric_value, rank_results

    results = comparison["results"]
    rows = [("rank", "encoder", "domain accuracy [95% CI]", "relative drift", "CKA")]
    for rank, i in enumerate(rank_results(results), 1):
        m = results[i]["metrics"]
        acc = metric_value(m, "domain_classifier", "accuracy")
        ci = m.get("domain_classifier", {}).get("ci")
        acc_s = f"{acc:.3f} [{ci[0]:.3f}, {ci[1]:.3f}]" if acc is not None and ci else "n/a"
        rows.append((str(rank), display_name(results[i]), acc_s,
                     _fmt(metric_value(m, "paired_drift", "relative_drift")), _fmt(metric_value(m, "cka"))))
    widths = [max(len(r[c]) for r in rows) for c in range(len(rows[0]))]
    for row in rows:
        say("  ".join(cell.ljust(w) for cell, w in zip(row, widths)).rstrip())
    for failure in comparison.get("failures", []):
        say(f"failed: {failure['name']}: {failure['error']}")
    for warning in comparison.get("warnings", []):
        say(f"warning: {warning}")
    say(f"note: {SAFETY_CAUTION}")


def print_alignment(result) -> None:
    """Where the checkpoint is, why training stopped, and before/after on the held-out pairs."""
    from ..results import metric_value

    al = result["alignment"]
    say(f"aligned checkpoint: {al['checkpoint']} (load it as checkpoint:{al['checkpoint']})")
    say(f"stopped: {al.get('stopped_because', 'step limit')}; kept the state of step {al.get('best_step', '?')} "
               f"(step 0 = the original encoder); measured on {al['held_out_pairs']} held-out pairs")
    rows = [("domain accuracy", "domain_classifier", "accuracy"), ("relative drift", "paired_drift", "relative_drift"),
            ("CKA", "cka", None)]
    for label, group, key in rows:
        before, after = metric_value(al["before"], group, key), metric_value(al["after"], group, key)
        say(f"  {label:<16} before {_fmt(before)}  after {_fmt(after)}")
    for name, probe in al["after"].get("probe", {}).items():
        b = al["before"].get("probe", {}).get(name, {})
        if "clean" in probe and "clean" in b:
            say(f"  probe {name:<10} clean {b['clean']:.3f} -> {probe['clean']:.3f}   "
                       f"cluttered {b['cluttered']:.3f} -> {probe['cluttered']:.3f}")
    say(f"note: {SAFETY_CAUTION}")


def _fmt(value, digits: int = 3) -> str:
    return "n/a" if value is None else f"{value:.{digits}f}"
