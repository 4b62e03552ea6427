"""Result files: loading and checking ``invariance.result/1`` and ``invariance.comparison/1``.

A *result* is the JSON object one ``score`` or ``align`` run writes for one encoder on one
data set; a *comparison* bundles several results (``compare``) together with the encoders
that failed midway. The report reads both; this module is the one place that decides
whether a file is one of ours and how encoders are ranked.
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path
from typing import Iterable, Sequence

from invariance.errors import InvarianceError

RESULT_SCHEMA = "invariance.result/1"
COMPARISON_SCHEMA = "invariance.comparison/1"


def load_result_files(paths: Iterable[str | os.PathLike]) -> list[dict]:
    """Read result and comparison files and return the results they hold, in order.

    Parameters
    ----------
    paths : iterable of path-like
        Files written by ``score``, ``align`` (``invariance.result/1``) or ``compare``
        (``invariance.comparison/1``). A comparison contributes each of its results.

    Returns
    -------
    list of dict
        The validated result dicts, file by file; the results of a comparison are
        flattened into the list in their stored order.

    Raises
    ------
    InvarianceError
        When a file is missing, is not JSON, or carries another schema or version.
    """
    return load_as_comparison(paths)["results"]


def load_as_comparison(paths: Iterable[str | os.PathLike]) -> dict:
    """Read result and comparison files into one comparison, keeping failures and warnings.

    Parameters
    ----------
    paths : iterable of path-like
        As for :func:`load_result_files`.

    Returns
    -------
    dict
        An ``invariance.comparison/1`` object whose ``failures`` and ``warnings`` are
        those stored in the comparison files read.
    """
    paths = list(paths)
    if not paths:
        raise InvarianceError("no result file given: pass one or more RESULT.json files")
    results, failures, warnings = [], [], []
    for path in paths:
        data = _read_json(Path(path))
        source = str(path)
        if data.get("schema") == COMPARISON_SCHEMA:
            results.extend(_comparison_results(data, source))
            failures.extend(_comparison_failures(data, source))
            warnings.extend(str(w) for w in data.get("warnings") or [])
        else:
            results.append(validate_result(data, source=source))
    return make_comparison(results, failures=failures, warnings=warnings)


def validate_result(result: object, *, source: str = "result") -> dict:
    """Check that ``result`` is an ``invariance.result/1`` object the report can read.

    Only the keys every later step relies on are checked (schema, encoder spec, data set,
    metrics); a single metric may legitimately be ``{"not_computable": reason}``.

    Parameters
    ----------
    result : object
        The parsed JSON value.
    source : str
        The file (or other origin) named in the error message.

    Returns
    -------
    dict
        ``result`` itself.
    """
    if not isinstance(result, dict):
        raise InvarianceError(
            f"{source}: not an invariance result (a JSON object with \"schema\": "
            f"\"{RESULT_SCHEMA}\" is expected); pass a file written by score, align or compare"
        )
    schema = result.get("schema")
    if schema != RESULT_SCHEMA:
        raise InvarianceError(
            f"{source}: schema {schema!r} is not supported; expected \"{RESULT_SCHEMA}\" or "
            f"\"{COMPARISON_SCHEMA}\" (re-create the file with this version of invariance)"
        )
    encoder = result.get("encoder")
    if not isinstance(encoder, dict) or not isinstance(encoder.get("spec"), str):
        raise InvarianceError(f"{source}: \"encoder.spec\" is missing; re-create the file with score or compare")
    if not isinstance(result.get("dataset"), dict):
        raise InvarianceError(f"{source}: \"dataset\" is missing; re-create the file with score or compare")
    if not isinstance(result.get("metrics"), dict):
        raise InvarianceError(f"{source}: \"metrics\" is missing; re-create the file with score or compare")
    return result


def check_same_dataset(results: Sequence[dict]) -> list[str]:
    """Warn when results were measured on different data sets.

    Comparing encoders is only fair on the same pairs; mixing data sets is allowed, but
    the report must say so. Results are compared on ``dataset.content_hash`` (when
    present) and ``dataset.pairs``.

    Parameters
    ----------
    results : sequence of dict
        Validated result dicts.

    Returns
    -------
    list of str
        One warning per mismatching key; empty when all results share the data set.
    """
    warnings = []
    for key, what in (("content_hash", "content hashes"), ("pairs", "pair counts")):
        values = {}
        for result in results:
            value = (result.get("dataset") or {}).get(key)
            if value is not None:
                values.setdefault(str(value), []).append(display_name(result))
        if len(values) > 1:
            listing = "; ".join(f"{value}: {', '.join(names)}" for value, names in values.items())
            warnings.append(
                f"These results come from different data sets (different {what}: {listing}); "
                "compare encoders on the same pairs before ranking them."
            )
    return warnings


def make_comparison(results: Sequence[dict], failures: Iterable[dict] = (),
                    warnings: Iterable[str] = ()) -> dict:
    """Bundle results into an ``invariance.comparison/1`` object.

    Parameters
    ----------
    results : sequence of dict
        Result dicts, one per encoder that finished.
    failures : iterable of dict
        ``{"spec", "name", "error"}`` for each encoder that failed midway.
    warnings : iterable of str
        Run-level warnings; data set mismatches found by :func:`check_same_dataset` are
        added once.

    Returns
    -------
    dict
        The comparison object, ready for :func:`invariance._io.atomic_write_json`.
    """
    results = [validate_result(r, source=f"result {i + 1}") for i, r in enumerate(results)]
    merged = []
    for warning in list(warnings) + check_same_dataset(results):
        if warning not in merged:
            merged.append(str(warning))
    return {
        "schema": COMPARISON_SCHEMA,
        "results": list(results),
        "failures": [_normalise_failure(f) for f in failures],
        "warnings": merged,
    }


def rank_results(results: Sequence[dict]) -> list[int]:
    """Order encoders from most to least invariant.

    The rule: the lower held-out domain-classifier accuracy ranks first (a classifier that
    cannot tell clean from cluttered features is the goal, 0.5 is chance). Accuracies equal
    at the reported precision (three decimals) are broken by the lower relative drift, then
    by input order. Results whose domain accuracy is not computable go last, ordered among
    themselves by relative drift; a missing drift counts as worst.

    Parameters
    ----------
    results : sequence of dict
        Result dicts.

    Returns
    -------
    list of int
        Indices into ``results``, best first.
    """
    def key(index: int):
        metrics = results[index].get("metrics") or {}
        accuracy = metric_value(metrics, "domain_classifier", "accuracy")
        drift = metric_value(metrics, "paired_drift", "relative_drift")
        return (
            accuracy is None,
            round(accuracy, 3) if accuracy is not None else 0.0,
            drift if drift is not None else math.inf,
            index,
        )

    return sorted(range(len(results)), key=key)


def display_name(result: dict) -> str:
    """The encoder's display name, falling back to its spec."""
    encoder = result.get("encoder") or {}
    return str(encoder.get("name") or encoder.get("spec") or "unnamed encoder")


def metric_value(metrics: dict, metric: str, key: str | None = None) -> float | None:
    """A finite number from ``metrics[metric][key]``, or ``None`` when absent or not computable.

    With ``key=None`` the metric itself is the number (``cka``).
    """
    entry = metrics.get(metric) if isinstance(metrics, dict) else None
    if key is None:
        value = entry
    elif isinstance(entry, dict) and "not_computable" not in entry:
        value = entry.get(key)
    else:
        value = None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        return None
    return float(value)


def _read_json(path: Path) -> dict:
    if not path.is_file():
        raise InvarianceError(f"{path}: file not found; pass a RESULT.json written by score, align or compare")
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InvarianceError(
            f"{path}: not valid JSON ({exc.__class__.__name__}); pass a RESULT.json written by score, align or compare"
        ) from None


def _comparison_results(data: dict, source: str) -> list[dict]:
    results = data.get("results")
    if not isinstance(results, list):
        raise InvarianceError(f"{source}: \"results\" must be a list; re-create the file with compare")
    return [validate_result(r, source=f"{source} (result {i + 1})") for i, r in enumerate(results)]


def _comparison_failures(data: dict, source: str) -> list[dict]:
    failures = data.get("failures") or []
    if not isinstance(failures, list):
        raise InvarianceError(f"{source}: \"failures\" must be a list; re-create the file with compare")
    return [_normalise_failure(f) for f in failures]


def _normalise_failure(failure: object) -> dict:
    # A failure may come from an older writer with fewer keys; the report shows what exists.
    failure = failure if isinstance(failure, dict) else {"error": str(failure)}
    spec = str(failure.get("spec") or "")
    return {
        "spec": spec,
        "name": str(failure.get("name") or spec or "unnamed encoder"),
        "error": str(failure.get("error") or "no error message was recorded"),
    }
