"""One vocabulary for reading the metrics: bands, verdict words, tones and number formats.

The terminal table (:func:`describe_metrics`) and the HTML report take their words from
the functions here, so the two outputs can never read the same number differently. Each
``read_*`` function returns a :class:`Reading`: short words for a table cell and a tone
(``good``, ``fair``, ``warn`` or ``bad``) that the report turns into a colour.

The words are reading aids placed next to the numbers; the numbers and their 95%
intervals decide. Every band bound is listed in :data:`BANDS` with where it comes from.
"""

from __future__ import annotations

import math
from typing import NamedTuple

# Chance accuracy of the domain classifier: every pair gives one clean and one cluttered
# image, so the two classes are balanced and guessing is right half of the time.
CHANCE = 0.5

# Significance level of the MMD permutation test's reading (Fisher's conventional 5%;
# common practice).
ALPHA = 0.05

# Decimals of the numbers in tables: three show the third decimal that the ranking rule
# compares accuracies on (see invariance.results.rank_results); common practice.
DIGITS = 3

DASH = "\u2013"

SMALL_SAMPLE_WORDS = "small sample"
SMALL_SAMPLE_NOTE = "Few pairs: the domain-classifier interval is wide; treat the rank as provisional."


def small_sample_note(n_pairs: int) -> str:
    """The result JSON's ``domain_classifier.note`` for ``n_pairs`` of 100 or fewer.

    Rabanser, Guennemann & Lipton, NeurIPS 2019, section 3.2: domain classifiers do poorly
    with 100 samples or fewer.
    """
    return (f"only {n_pairs} pairs: domain classifiers have little power with 100 or fewer samples "
            f"(Rabanser et al., NeurIPS 2019), so a near-chance accuracy is weak evidence of invariance")

CLOSE_TO_CHANCE = "close to chance"
BELOW_CHANCE = "below chance (check the splits)"
NO_INTERVAL = "no interval: chance not ruled out"
DISTRIBUTIONS_DIFFER = "distributions differ"
NO_DETECTABLE_DIFFERENCE = "no detectable difference"
NO_TEST = "no permutation test result"


class Reading(NamedTuple):
    """Words for a number and the tone they are shown in.

    Attributes
    ----------
    words : str
        Short plain words, e.g. ``"close to chance"``.
    tone : str
        ``"good"``, ``"fair"``, ``"warn"`` or ``"bad"``.
    """

    words: str
    tone: str


class Band(NamedTuple):
    """One band of a metric: values up to (or from) ``bound`` read as ``words``."""

    bound: float | None
    words: str
    tone: str
    source: str


_COMMON = "common practice (reading aid, not a gate)"

# Bands checked in order; the last has no bound. For metrics in _LOWER_IS_BETTER a value
# at or below the bound falls in the band; for the others a value at or above it, except
# domain accuracy, whose bands are upper bounds (strictly below) on how separable it is.
BANDS: dict[str, tuple[Band, ...]] = {
    # Only read once the 95% interval lies above chance (see read_domain_accuracy).
    "domain_accuracy": (
        Band(0.6, "barely separable", "fair", _COMMON),
        Band(0.8, "partly separable", "warn", _COMMON),
        Band(0.95, "separable", "bad", _COMMON),
        Band(None, "fully separable", "bad", _COMMON),
    ),
    # PAD = 2(1 - 2 error) (Ben-David et al., NIPS 2006): 0.2 and 1.0 are accuracies of
    # 0.55 and 0.75; the cut-offs themselves are reading aids.
    "proxy_a_distance": (
        Band(0.2, "small", "good", _COMMON),
        Band(1.0, "moderate", "warn", _COMMON),
        Band(None, "large", "bad", _COMMON),
    ),
    # 1.0 is "as far as a different scene" by the definition of relative drift.
    "relative_drift": (
        Band(0.1, "small", "good", _COMMON),
        Band(0.3, "moderate", "fair", _COMMON),
        Band(0.7, "large", "warn", _COMMON),
        Band(None, "near a scene change", "bad", _COMMON),
    ),
    "pair_retrieval": (
        Band(0.9, "own pair found", "good", _COMMON),
        Band(0.5, "often found", "warn", _COMMON),
        Band(None, "often lost", "bad", _COMMON),
    ),
    # Linear CKA (Kornblith et al., ICML 2019) is 1 for the same representation up to
    # rotation and scale; the paper gives no bands.
    "cka": (
        Band(0.9, "very similar", "good", _COMMON),
        Band(0.7, "similar", "fair", _COMMON),
        Band(0.4, "partly similar", "warn", _COMMON),
        Band(None, "dissimilar", "bad", _COMMON),
    ),
    "probe_gap": (
        Band(0.02, "task kept", "good", _COMMON),
        Band(0.1, "some loss", "warn", _COMMON),
        Band(None, "task degraded", "bad", _COMMON),
    ),
}

_LOWER_IS_BETTER = frozenset({"proxy_a_distance", "relative_drift", "probe_gap"})


# ---------------------------------------------------------------- number formats

def finite(value) -> float | None:
    """``value`` as a float when it is a finite real number (not a bool), else ``None``."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        return None
    return float(value)


def format_number(value, digits: int = DIGITS) -> str:
    """``value`` with ``digits`` decimals, or a dash when it is not a finite number."""
    value = finite(value)
    return DASH if value is None else f"{value:.{digits}f}"


def format_percent(value) -> str:
    """``value`` (a fraction) as a whole percentage, e.g. ``0.565`` -> ``"57%"``."""
    value = finite(value)
    return DASH if value is None else f"{100 * value:.0f}%"


def interval(ci) -> tuple[float, float] | None:
    """A readable ``(low, high)`` pair from a stored interval, or ``None``."""
    if not isinstance(ci, (list, tuple)) or len(ci) != 2:
        return None
    low, high = finite(ci[0]), finite(ci[1])
    return None if low is None or high is None else (low, high)


def format_interval(ci, digits: int = DIGITS) -> str:
    """``"[low, high]"`` with ``digits`` decimals, or ``""`` when there is no interval."""
    if not isinstance(ci, (list, tuple)) or len(ci) != 2:
        return ""
    return f"[{format_number(ci[0], digits)}, {format_number(ci[1], digits)}]"


def format_percent_interval(ci) -> str:
    """``"[low%, high%]"``, or ``""`` when there is no interval."""
    if not isinstance(ci, (list, tuple)) or len(ci) != 2:
        return ""
    return f"[{format_percent(ci[0])}, {format_percent(ci[1])}]"


def format_p_value(value) -> str:
    """``"p = 0.038"``; ``"p < 0.001"`` below what three decimals show; a dash when absent."""
    value = finite(value)
    if value is None:
        return f"p {DASH}"
    return "p < 0.001" if value < 0.001 else f"p = {value:.3f}"


# ---------------------------------------------------------------- readings

def _band(metric: str, value: float) -> Reading:
    lower = metric in _LOWER_IS_BETTER
    for band in BANDS[metric]:
        if band.bound is None or (value <= band.bound if lower else value >= band.bound):
            return Reading(band.words, band.tone)
    raise AssertionError("the last band has no bound")


def separates_domains(ci) -> bool | None:
    """Whether the domain accuracy's 95% interval lies wholly above chance.

    Parameters
    ----------
    ci : (float, float) or None
        The 95% interval of the held-out domain accuracy.

    Returns
    -------
    bool or None
        ``True`` when the lower bound is above :data:`CHANCE`, ``False`` when the interval
        reaches chance or below, ``None`` without a readable interval.
    """
    ci = interval(ci)
    return None if ci is None else ci[0] > CHANCE


def read_domain_accuracy(accuracy: float, ci, *, small_sample: bool = False) -> Reading:
    """Words for the held-out domain accuracy, decided by its 95% interval.

    One rule: the encoder separates the domains when the whole interval lies above
    chance; then the accuracy says how far (:data:`BANDS` ``"domain_accuracy"``).
    Otherwise it is close to chance, or below chance when the whole interval is.

    Parameters
    ----------
    accuracy : float
        Held-out accuracy of the domain classifier.
    ci : (float, float) or None
        Its 95% interval.
    small_sample : bool
        The metric's ``small_sample`` flag; adds :data:`SMALL_SAMPLE_WORDS`.

    Returns
    -------
    Reading
    """
    separated = separates_domains(ci)
    if separated is None:
        reading = Reading(NO_INTERVAL, "warn")
    elif separated:
        degree = next(b for b in BANDS["domain_accuracy"] if b.bound is None or accuracy < b.bound)
        reading = Reading(degree.words, degree.tone)
    elif interval(ci)[1] < CHANCE:
        reading = Reading(BELOW_CHANCE, "warn")
    else:
        reading = Reading(CLOSE_TO_CHANCE, "good")
    if small_sample:
        return Reading(f"{reading.words}; {SMALL_SAMPLE_WORDS}", reading.tone)
    return reading


def read_proxy_a_distance(distance: float) -> Reading:
    """Words for the proxy A-distance (0 to 2)."""
    return _band("proxy_a_distance", distance)


def read_mmd(p_value) -> Reading:
    """Words for the MMD permutation test, decided by its p-value at :data:`ALPHA`."""
    p_value = finite(p_value)
    if p_value is None:
        return Reading(NO_TEST, "warn")
    if p_value < ALPHA:
        return Reading(DISTRIBUTIONS_DIFFER, "bad")
    return Reading(NO_DETECTABLE_DIFFERENCE, "good")


def read_relative_drift(drift: float) -> Reading:
    """Words for the relative drift (0 invariant, 1 as far as a different scene)."""
    return _band("relative_drift", drift)


def read_pair_retrieval(top1: float) -> Reading:
    """Words for the top-1 pair retrieval rate."""
    return _band("pair_retrieval", top1)


def read_cka(value: float) -> Reading:
    """Words for linear CKA between clean and cluttered features."""
    return _band("cka", value)


def read_probe_gap(gap: float) -> Reading:
    """Words for a linear probe's clean minus cluttered score."""
    return _band("probe_gap", gap)


# ---------------------------------------------------------------- terminal rows

def _domain_row(m: dict) -> tuple[str, str, str, str]:
    accuracy, ci = m["accuracy"], interval(m.get("ci"))
    reading = read_domain_accuracy(accuracy, ci, small_sample=bool(m.get("small_sample")))
    told = f"a linear classifier tells clean from cluttered {format_percent(accuracy)} of the time"
    chance = format_percent(CHANCE)
    separated = separates_domains(ci)
    if separated is None:
        why = f"{told}; without an interval chance ({chance}) is not ruled out"
    elif separated:
        why = f"{told} and its 95% interval lies above chance ({chance}), so the encoder separates the domains"
    elif ci[1] < CHANCE:
        why = f"{told} and its 95% interval lies below chance ({chance}), so check that pairs are split by scene"
    else:
        why = (f"{told} and its 95% interval includes chance ({chance}), so there is no evidence the "
               f"encoder separates the domains")
    return ("domain classifier accuracy", format_percent(accuracy), format_percent_interval(ci),
            f"{reading.words}: {why}")


def _mmd_row(m: dict) -> tuple[str, str, str, str]:
    p = format_p_value(m.get("p_value"))
    reading = read_mmd(m.get("p_value"))
    why = {
        DISTRIBUTIONS_DIFFER: "the clean and cluttered feature distributions are not the same",
        NO_DETECTABLE_DIFFERENCE: "the clean and cluttered feature distributions cannot be told apart",
    }.get(reading.words, "the permutation test did not report a p-value")
    return ("MMD^2", f"{format_number(m['mmd2'], 4)} ({p})", "",
            f"{reading.words}: {why} (within-pair permutation test, {p})")


def _drift_rows(m: dict) -> list[tuple[str, str, str, str]]:
    drift, top1 = m["relative_drift"], m["pair_retrieval_top1"]
    return [
        ("relative drift", format_number(drift), format_interval(m.get("relative_drift_ci")),
         f"{read_relative_drift(drift).words}: clutter moves a scene's feature {format_percent(drift)} as far "
         f"as changing the scene does (0 = invariant, 1 = as far as a different scene)"),
        ("pair retrieval top-1", format_percent(top1), "",
         f"{read_pair_retrieval(top1).words}: {format_percent(top1)} of cluttered images find their own "
         f"clean image as the nearest clean feature"),
    ]


def _cka_row(value: float) -> tuple[str, str, str, str]:
    return ("linear CKA", format_number(value), "",
            f"{read_cka(value).words}: clean and cluttered representations align at {format_number(value)} "
            f"(1 = the same up to rotation and scale, 0 = unrelated)")


def _probe_row(label: str, m: dict) -> tuple[str, str, str, str]:
    clean, cluttered, gap = (format_number(m[k]) for k in ("clean", "cluttered", "gap"))
    return (f"probe {label} ({m['metric']})", f"{clean} -> {cluttered} (gap {gap})", "",
            f"{read_probe_gap(m['gap']).words}: a probe trained on clean features scores {clean} on "
            f"held-out clean and {cluttered} on the same scenes cluttered (gap {gap})")


def _not_computable(title: str, value) -> tuple[str, str, str, str] | None:
    if isinstance(value, dict) and "not_computable" in value:
        return (title, "n/a", "", str(value["not_computable"]))
    return None


def describe_metrics(metrics: dict) -> list[tuple[str, str, str, str]]:
    """Plain-language rows for the terminal table.

    Parameters
    ----------
    metrics : dict
        The ``metrics`` object of :func:`invariance.scoring.score_features`.

    Returns
    -------
    list of (name, value, interval, reading) tuples of str
        One row per metric (two for paired drift, one per probe); ``interval`` is the
        95% interval where the metric has one, else "". Each reading starts with the
        words the HTML report shows for the same number. A metric that could not be
        computed reads "n/a" with its reason.
    """
    rows = []
    single = (
        ("domain_classifier", "domain classifier accuracy", _domain_row),
        ("mmd", "MMD^2", _mmd_row),
        ("paired_drift", "relative drift", _drift_rows),
        ("cka", "linear CKA", _cka_row),
    )
    for key, title, describe in single:
        if key not in metrics:
            continue
        missing = _not_computable(title, metrics[key])
        described = [missing] if missing else describe(metrics[key])
        rows.extend(described if isinstance(described, list) else [described])
    probes = metrics.get("probe") or {}
    missing = _not_computable("probe", probes)
    if missing:
        return rows + [missing]
    for label, probe in probes.items():
        rows.append(_not_computable(f"probe {label}", probe) or _probe_row(label, probe))
    return rows
