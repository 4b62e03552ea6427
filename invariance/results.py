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

# Largest result file read: a comparison of ten encoders on 50,000 pairs is about 40 MB, so
# 256 MiB leaves room while keeping a hostile file from filling the memory.
MAX_RESULT_BYTES = 256 * 2**20


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
        if isinstance(data, dict) and data.get("schema") == COMPARISON_SCHEMA:
            results.extend(_check_values(r, f"{source} (result {i + 1})")
                           for i, r in enumerate(_comparison_results(data, source)))
            failures.extend(_comparison_failures(data, source))
            warnings.extend(_strings(data.get("warnings"), "warnings", source))
        else:
            results.append(_check_values(validate_result(data, source=source), source))
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
    overlap = [w for w in (aligned_on_same_pairs(r) for r in results) if w]
    for warning in list(warnings) + check_same_dataset(results) + overlap:
        if warning not in merged:
            merged.append(str(warning))
    return {
        "schema": COMPARISON_SCHEMA,
        "results": list(results),
        "failures": [_normalise_failure(f) for f in failures],
        "warnings": merged,
    }


def rank_results(results: Sequence[dict]) -> list[int]:
    """Order encoders from the one to try first on hardware to the last.

    The rule is :func:`invariance.verdict.rank`: the task information left in the
    cluttered view (mean skill over the tasks some encoder decodes on clean, 0 to 1),
    with collapsed (constant) features last; without task labels it falls back to the
    lower held-out domain accuracy (ties at three decimals by the lower relative drift).
    Encoders whose intervals overlap share a rank there (see ``Ranking.ranks``); this
    function gives the order only, input order breaking exact ties.

    Parameters
    ----------
    results : sequence of dict
        Result dicts.

    Returns
    -------
    list of int
        Indices into ``results``, best first.
    """
    from invariance.verdict import rank

    return rank(results).order


def add_caution(data: dict) -> dict:
    """``data`` (a result or comparison) with the safety caution under ``caution``.

    Every written result carries it, so a file read without the tool still says that
    passing these checks is evidence, not a certificate that a robot is safe.
    """
    from invariance import SAFETY_CAUTION

    data["caution"] = SAFETY_CAUTION
    for result in data.get("results") or []:
        if isinstance(result, dict):
            result["caution"] = SAFETY_CAUTION
    return data


def aligned_on_same_pairs(result: dict) -> str | None:
    """A warning when a checkpoint is scored on the pairs it was aligned on, else ``None``.

    Reads the content hash of the alignment's data set that ``invariance align`` records
    in the checkpoint (``encoder.aligned_on``, a content hash, or a dict holding
    ``content_hash``) and compares it with ``dataset.content_hash``.
    """
    encoder = result.get("encoder") if isinstance(result.get("encoder"), dict) else {}
    aligned_on = encoder.get("aligned_on")
    if isinstance(aligned_on, dict):
        aligned_on = aligned_on.get("content_hash")
    scored_on = (result.get("dataset") or {}).get("content_hash") if isinstance(result.get("dataset"), dict) else None
    if not isinstance(aligned_on, str) or not aligned_on or aligned_on != scored_on:
        return None
    return (f"{display_name(result)} is scored on the pairs it was aligned on (content hash {aligned_on[:12]}...): "
            "the alignment trained on these scenes, so its numbers flatter it; score it on scenes it never saw.")


def display_name(result: dict) -> str:
    """The encoder's display name, falling back to its spec.

    A copy whose alignment did not improve on the original (``alignment.improved`` is
    false) is not titled "aligned": the word is dropped and the name says so.
    """
    encoder = result.get("encoder") or {}
    name = str(encoder.get("name") or encoder.get("spec") or "unnamed encoder")
    alignment = result.get("alignment")
    if isinstance(alignment, dict) and alignment.get("improved") is False:
        name = name.replace(", aligned", "").replace(" aligned", "") + " (alignment did not improve it)"
    return name


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


def _refuse_constant(name: str):
    raise ValueError(f"{name} is not a JSON number")


def _read_json(path: Path):
    """The parsed JSON value of ``path``: any JSON value, checked by the caller."""
    if not path.is_file():
        raise InvarianceError(f"{path}: file not found; pass a RESULT.json written by score, align or compare")
    fix = "pass a RESULT.json written by score, align or compare"
    try:
        size = path.stat().st_size
        if size > MAX_RESULT_BYTES:
            raise InvarianceError(f"{path}: {size:,} bytes is more than a result file holds "
                                  f"(limit {MAX_RESULT_BYTES:,}); {fix}")
        text = path.read_text(encoding="utf-8")
        # NaN and Infinity are not JSON (RFC 8259, section 6), although Python's parser reads them.
        return json.loads(text, parse_constant=_refuse_constant)
    except OSError as exc:
        raise InvarianceError(f"{path}: cannot read it ({exc.strerror or exc}); {fix}") from None
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:
        # ValueError covers JSONDecodeError, NaN/Infinity and integers too long to convert
        # (Python's int max-str-digits guard); RecursionError, arrays nested past the stack.
        raise InvarianceError(f"{path}: not valid JSON ({_short_reason(exc)}); {fix}") from None


def _short_reason(exc: BaseException) -> str:
    if isinstance(exc, RecursionError):
        return "nested too deeply"
    text = str(exc).splitlines()[0] if str(exc) else ""
    if "integer string conversion" in text:  # Python's int max-str-digits guard
        return "a number has thousands of digits"
    return f"{type(exc).__name__}: {text[:120]}" if text else type(exc).__name__


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


# --------------------------------------------------------------------------- value checks
#
# A result file is data from anywhere: every value a later step reads is checked on load,
# so a hand-edited or hostile file is refused with one line instead of being ranked
# (an accuracy of 1e300) or shown wrongly (``"warnings": "abc"`` read as three warnings).

_FIX = "re-create the file with score, align or compare"
_UNIT = (0.0, 1.0)
_NONNEGATIVE = (0.0, math.inf)
# Ranges of the documented metric values (docs/design.md, "The metrics object"): accuracies,
# shares and p-values are proportions; drift and distances are non-negative; linear CKA lies
# in [0, 1] (Kornblith et al., ICML 2019); debiased CKA, an inner product of U-centred
# kernel matrices over their norms (Song et al., JMLR 13, 2012), lies in [-1, 1].
# A value of another type is left to the report,
# which shows it as unreadable; a number outside its range would be ranked or read as real.
_RANGES = {
    "domain_classifier": {"accuracy": _UNIT, "paired_accuracy": _UNIT, "ci": _UNIT},
    "paired_drift": {"relative_drift": _NONNEGATIVE, "relative_drift_ci": _NONNEGATIVE,
                     "typical_distance": _NONNEGATIVE, "pair_retrieval_top1": _UNIT},
}
# Rounding slack on range ends: values are computed in floating point (common practice).
_SLACK = 1e-9


def _refuse(source: str, where: str, what: str) -> InvarianceError:
    return InvarianceError(f"{source}: {where} {what}; {_FIX}")


def _strings(value, where: str, source: str) -> list[str]:
    """``value`` as a list of strings (``None`` is an empty list); anything else is refused."""
    if value is None:
        return []
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        raise _refuse(source, f'"{where}"', "must be a list of sentences")
    return list(value)


def _number(value, where: str, source: str, bounds=(-math.inf, math.inf)) -> None:
    """A number outside ``bounds`` is refused; other types are the report's to show as unreadable."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return
    low, high = bounds
    if not low - _SLACK <= value <= high + _SLACK:
        shown = f"{value:.6g}" if isinstance(value, float) else str(value)[:40]
        raise _refuse(source, where, f"is {shown}, outside [{low:g}, {high:g}]")


def _dict(value) -> dict:
    """``value`` when it is a dict, else an empty one (odd blocks are the report's to show)."""
    return value if isinstance(value, dict) else {}


def _check_finite(value, source: str) -> None:
    """Every float anywhere in ``value`` is finite (JSON has no NaN; 1e400 parses as inf)."""
    stack = [value]
    while stack:
        item = stack.pop()
        if isinstance(item, float) and not math.isfinite(item):
            raise _refuse(source, "a number", f"is {item}, not finite")
        if isinstance(item, dict):
            stack.extend(item.values())
        elif isinstance(item, list):
            stack.extend(item)


def _check_entry(name: str, entry, where: str, source: str) -> None:
    """One metric of a metrics object: its numbers in their documented ranges."""
    if not isinstance(entry, dict) or "not_computable" in entry:
        return
    for key, value in entry.items():
        bounds = _UNIT if key.startswith("p_value") else _RANGES.get(name, {}).get(key)
        if bounds is None or value is None:
            continue
        for i, item in enumerate(value if isinstance(value, list) else [value]):
            _number(item, f"{where}.{key}" + (f"[{i}]" if isinstance(value, list) else ""), source, bounds)


def _check_probe(probe, where: str, source: str) -> None:
    if not isinstance(probe, dict) or "not_computable" in probe:
        return
    for label, entry in probe.items():
        if not isinstance(entry, dict) or "not_computable" in entry:
            continue
        # An accuracy is a proportion, so its gap lies in [-1, 1]; R² is at most 1 and unbounded below.
        accuracy = entry.get("metric") == "accuracy"
        score = _UNIT if accuracy else (-math.inf, 1.0)
        bounds = {"clean": score, "cluttered": score, "gap": (-1.0, 1.0) if accuracy else (-math.inf, math.inf)}
        for key, limits in bounds.items():
            _number(entry.get(key), f"{where}.{label}.{key}", source, limits)


def _check_metrics(metrics, where: str, source: str) -> None:
    for name, entry in _dict(metrics).items():
        if name == "probe":
            _check_probe(entry, f"{where}.probe", source)
        elif name in ("cka", "cka_linear") and not isinstance(entry, dict) and entry is not None:
            _number(entry, f"{where}.{name}", source, (-1.0, 1.0) if name == "cka" else _UNIT)
        else:
            _check_entry(name, entry, f"{where}.{name}", source)


def _check_blocks(result: dict, source: str) -> None:
    """The blocks read for the whole page (data set, environment, gates, pairs) have their types."""
    for key in ("environment", "gates"):
        if result.get(key) is not None and not isinstance(result[key], dict):
            raise _refuse(source, f'"{key}"', f"must be an object, not {type(result[key]).__name__}")
    if result.get("pairs") is not None and not isinstance(result["pairs"], list):
        raise _refuse(source, '"pairs"', f"must be a list, not {type(result['pairs']).__name__}")
    path = result["dataset"].get("path")
    if path is not None and not isinstance(path, str):
        raise _refuse(source, "dataset.path", f"must be a folder name, not {type(path).__name__}")


def _check_pairs(pairs, source: str) -> None:
    for i, pair in enumerate(pairs if isinstance(pairs, list) else []):
        if isinstance(pair, dict) and pair.get("drift") is not None:
            _number(pair["drift"], f"pairs[{i}].drift", source, _NONNEGATIVE)


def _check_nested_metrics(result: dict, source: str) -> None:
    """The metrics of every layer, every breakdown group and alignment's before and after."""
    for layer, metrics in _dict(result.get("layers")).items():
        _check_metrics(metrics, f"layers.{layer}", source)
    for column, groups in _dict(result.get("breakdowns")).items():
        for value, group in _dict(groups).items():
            _check_metrics(_dict(group).get("metrics"), f"breakdowns.{column}.{value}.metrics", source)
    alignment = _dict(result.get("alignment"))
    for key in ("before", "after"):
        _check_metrics(alignment.get(key), f"alignment.{key}", source)


def _check_values(result: dict, source: str) -> dict:
    """``result`` read from a file, after refusing values that would be shown or ranked wrongly.

    Every float must be finite, ``warnings`` a list of sentences, the blocks the report's
    page reads outside any one encoder's section of the right type, and every documented
    metric number inside its range.
    """
    _check_finite(result, source)
    _strings(result.get("warnings"), "warnings", source)
    _check_blocks(result, source)
    _check_pairs(result.get("pairs"), source)
    _check_metrics(result["metrics"], "metrics", source)
    _check_nested_metrics(result, source)
    return result
