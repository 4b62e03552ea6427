"""One vocabulary for reading the metrics: bands, verdict words, tones and number formats.

The terminal table (:func:`describe_metrics`) and the HTML report take their words from
the functions here, so the two outputs can never read the same number differently. Each
``read_*`` function returns a :class:`Reading`: short words for a table cell and a tone
(``good``, ``fair``, ``warn`` or ``bad``) that the report turns into a colour.

The words are reading aids placed next to the numbers; the numbers and their 95%
intervals decide. Every band bound is listed in :data:`BANDS` with where it comes from,
and ``docs/readings.md`` explains each reading. A test reads three ways wherever it has an
interval: a difference shown (the interval excludes the null value), no difference larger
than a stated margin (the whole interval inside the margin: the interval form of two
one-sided tests, Schuirmann, J. Pharmacokinet. Biopharm. 15, 1987), or inconclusive, in a
neutral tone. A test that did not reject is never read as "invariant" on its own.
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

# Margin around chance inside which a whole 95% interval of the domain accuracy reads as
# "indistinguishable": 0.05 accuracy is a proxy A-distance of 0.2, the "small" PAD band
# below (common practice, not a published cut-off).
DOMAIN_MARGIN = 0.05

# Margin of a probe gap (in the probe's own score: accuracy or R^2) inside which a whole
# 95% interval reads as "task kept" (common practice).
GAP_MARGIN = 0.05

CLOSE_TO_CHANCE = "indistinguishable from chance"
INCONCLUSIVE = "inconclusive"
BELOW_CHANCE = "below chance (check the splits)"
NO_INTERVAL = "no interval: chance not ruled out"
DISTRIBUTIONS_DIFFER = "distributions differ"
NO_DETECTABLE_DIFFERENCE = "no detectable difference"
NOT_DECODABLE = "not decodable on clean"
TASK_KEPT = "task kept"
NO_TEST = "no permutation test result"


class Reading(NamedTuple):
    """Words for a number and the tone they are shown in.

    Attributes
    ----------
    words : str
        Short plain words, e.g. ``"close to chance"``.
    tone : str
        ``"good"``, ``"fair"``, ``"warn"``, ``"bad"`` or ``"neutral"`` (no evidence
        either way: shown without a colour that reads as a verdict).
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
    # Debiased linear CKA (Song et al., JMLR 13, 2012; Nguyen, Raghu & Kornblith, ICLR
    # 2021) is 1 for the same representation up to rotation and scale and about 0 for
    # independent features (it can be negative); the papers give no bands.
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
    # Task information on cluttered views, as a skill score (invariance.verdict): the share
    # of the way from the no-feature baseline (0) to a perfect probe (1) that the clean-
    # trained probe still goes on cluttered views. Below 0.1 the encoder is called
    # uninformative (see invariance.verdict.SKILL_FLOOR).
    "task_information": (
        Band(0.8, "task information kept", "good", _COMMON),
        Band(0.5, "partly kept", "fair", _COMMON),
        Band(0.1, "mostly lost", "warn", _COMMON),
        Band(None, "lost (uninformative)", "bad", _COMMON),
    ),
}

_LOWER_IS_BETTER = frozenset({"proxy_a_distance", "relative_drift", "probe_gap"})

# Where each metric's reading note lives in the report (``#note-...``) and in
# docs/readings.md (the same anchors).
NOTE_ANCHORS = {
    "task_information": "note-information", "domain_accuracy": "note-domain", "proxy_a_distance": "note-pad",
    "mmd": "note-mmd", "relative_drift": "note-drift", "pair_retrieval": "note-retrieval", "cka": "note-cka",
    "probe_gap": "note-probe", "gates": "note-gates",
}


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
    """``value`` (a fraction) as a whole percentage, e.g. ``0.565`` -> ``"57%"``.

    Kept for callers outside the readings; accuracies and shares are shown as fractions
    with :data:`DIGITS` decimals everywhere the product prints them (one unit).
    """
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


def indistinguishable(ci, margin: float = DOMAIN_MARGIN) -> bool:
    """Whether the whole 95% interval lies within ``margin`` of chance.

    The interval form of two one-sided tests of equivalence (Schuirmann, J.
    Pharmacokinet. Biopharm. 15, 1987; a 95% interval is the stricter, 2.5% per side).
    """
    ci = interval(ci)
    return ci is not None and CHANCE - margin <= ci[0] and ci[1] <= CHANCE + margin


def _count(value) -> int | None:
    """``value`` when it is a positive int (not a bool), else ``None``."""
    return value if isinstance(value, int) and not isinstance(value, bool) and value > 0 else None


def _reach(ci, sample: str | None) -> str:
    """``"60 pairs; the interval reaches 0.440-0.625"`` for an inconclusive reading."""
    count = f"{sample}; " if sample else ""
    return f"{count}the interval reaches {format_number(ci[0])}{DASH}{format_number(ci[1])}"


def _rows_of_a_and_b(rows, groups=None) -> str | None:
    """``"40 rows of A and 24 of B in 10 and 6 groups"``: the sample of an unpaired measure."""
    if not isinstance(rows, (list, tuple)) or len(rows) != 2 or not all(_count(r) for r in rows):
        return None
    words = f"{rows[0]} rows of A and {rows[1]} of B"
    if isinstance(groups, (list, tuple)) and len(groups) == 2 and all(_count(g) for g in groups):
        words += f" in {groups[0]} and {groups[1]} groups"
    return words


def _unpaired_entry(entry) -> bool:
    """Whether a metric entry measures two unpaired domains (rows of A and of B, no pairs).

    The unpaired domain classifier and MMD record ``rows_used`` ([A, B]); an unpaired probe
    records ``n_test_b`` (B's rows).
    """
    return isinstance(entry, dict) and (isinstance(entry.get("rows_used"), (list, tuple)) or "n_test_b" in entry)


def read_domain_accuracy(accuracy: float, ci, *, small_sample: bool = False, pairs: int | None = None,
                         sample: str | None = None) -> Reading:
    """Words for the held-out domain accuracy, decided by its 95% interval.

    Three readings: *separable* when the whole interval lies above chance (the accuracy
    then says how far, :data:`BANDS` ``"domain_accuracy"``); *indistinguishable from
    chance* when the whole interval lies within :data:`DOMAIN_MARGIN` of 0.5; otherwise
    *inconclusive*, in a neutral tone, naming the sample and how far the interval reaches.
    An interval wholly below chance points at a leak in the splits.

    Parameters
    ----------
    accuracy : float
        Held-out accuracy of the domain classifier.
    ci : (float, float) or None
        Its 95% interval.
    small_sample : bool
        The metric's ``small_sample`` flag; adds :data:`SMALL_SAMPLE_WORDS`.
    pairs : int, optional
        Pairs the accuracy was measured on, named in an inconclusive reading.
    sample : str, optional
        The sample in words, named instead of ``pairs`` (:func:`domain_sample`: rows of A
        and B for unpaired domains, which have no pairs).

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
    elif indistinguishable(ci):
        reading = Reading(CLOSE_TO_CHANCE, "good")
    else:
        count = sample or (f"{pairs} pairs" if _count(pairs) else None)
        reading = Reading(f"{INCONCLUSIVE} ({_reach(interval(ci), count)})", "neutral")
    if small_sample:
        return Reading(f"{reading.words}; {SMALL_SAMPLE_WORDS}", reading.tone)
    return reading


def read_proxy_a_distance(distance: float) -> Reading:
    """Words for the proxy A-distance (0 to 2)."""
    return _band("proxy_a_distance", distance)


def read_mmd(p_value) -> Reading:
    """Words for the MMD permutation test, decided by its p-value at :data:`ALPHA`.

    A p-value at or above :data:`ALPHA` reads "no detectable difference" in a neutral tone:
    the test has no interval of the effect, so not rejecting is no evidence of invariance
    (absence of evidence; Altman & Bland, BMJ 311, 1995).
    """
    p_value = finite(p_value)
    if p_value is None:
        return Reading(NO_TEST, "warn")
    if p_value < ALPHA:
        return Reading(DISTRIBUTIONS_DIFFER, "bad")
    return Reading(NO_DETECTABLE_DIFFERENCE, "neutral")


def read_relative_drift(drift: float) -> Reading:
    """Words for the mean relative drift (0 invariant, 1 as far as a different scene)."""
    return _band("relative_drift", drift)


def read_pair_retrieval(top1: float) -> Reading:
    """Words for the top-1 pair retrieval rate."""
    return _band("pair_retrieval", top1)


def read_cka(value: float) -> Reading:
    """Words for debiased CKA between clean and cluttered features."""
    return _band("cka", value)


def read_probe_gap(gap: float) -> Reading:
    """Words for a probe's clean minus cluttered score, from the point value alone."""
    return _band("probe_gap", gap)


def read_task_information(skill: float) -> Reading:
    """Words for the task information left on cluttered views (skill score, 0 to 1)."""
    return _band("task_information", skill)


def gap_unit(entry: dict) -> str:
    """The unit a probe's gap is in: ``"accuracy"`` or ``"R\u00b2"``."""
    return "R\u00b2" if entry.get("metric") == "r2" else "accuracy"


def probe_decodable(entry: dict) -> bool:
    """Whether the probe learned the task on clean views (``decodable``, or the scores).

    Results written before ``decodable`` existed: an R^2 above 0 (the training mean) or,
    for classes, any accuracy (no baseline was stored) counts as decodable.
    """
    stored = entry.get("decodable")
    if isinstance(stored, bool):
        return stored
    clean, baseline = finite(entry.get("clean")), finite(entry.get("baseline"))
    if clean is None:
        return False
    if baseline is not None:
        return clean > baseline
    return clean > 0.0 if entry.get("metric") == "r2" else True


def read_probe(entry: dict) -> Reading:
    """Words for one probe, decided by its gap's 95% interval where it has one.

    ``not decodable on clean`` (neutral) when the probe never learned the task; ``task
    kept`` when the whole gap interval lies within :data:`GAP_MARGIN` of 0; a loss band
    (:data:`BANDS` ``"probe_gap"``) when the interval lies above 0; otherwise
    inconclusive. Without an interval (older results) the point gap's band is used.
    """
    if not probe_decodable(entry):
        return Reading(NOT_DECODABLE, "neutral")
    gap, ci = finite(entry.get("gap")), interval(entry.get("gap_ci"))
    if gap is None:
        return Reading(NO_INTERVAL, "warn")
    if ci is None:
        return read_probe_gap(gap)
    if -GAP_MARGIN <= ci[0] and ci[1] <= GAP_MARGIN:
        return Reading(TASK_KEPT, "good")
    if ci[0] > 0:
        band = read_probe_gap(gap)
        return band if band.words != TASK_KEPT else Reading("some loss", "warn")
    if ci[1] < 0:
        return Reading("better on cluttered", "neutral")
    return Reading(f"{INCONCLUSIVE} ({_reach(ci, _probe_sample(entry))})", "neutral")


def _probe_sample(entry: dict) -> str | None:
    """The rows behind a probe's scores: held-out pairs, or held-out rows of A and the rows of B."""
    held_out = _count(entry.get("n_test"))
    if _unpaired_entry(entry):
        rows_b = _count(entry.get("n_test_b"))
        return f"{held_out} held-out rows of A and {rows_b} rows of B" if held_out and rows_b else None
    return f"{held_out} held-out pairs" if held_out else None


# ---------------------------------------------------------------- terminal rows

Row = tuple[str, str, str, str]


def domain_pairs(entry: dict, default: int | None = None) -> int | None:
    """Pairs behind a domain accuracy: ``pairs_used``, else half its held-out images, else
    ``default``; ``None`` for unpaired domains, which have rows, not pairs (:func:`domain_sample`)."""
    if _unpaired_entry(entry):
        return None
    for key, scale in (("pairs_used", 1), ("n_test", 2)):
        value = _count(entry.get(key))
        if value:
            return value // scale
    return _count(default)


def sample_unit(entry: dict) -> str:
    """What more of would narrow a measure's interval: ``"pairs"``, or for unpaired domains
    ``"episodes"`` (resampled by group) or ``"rows"`` (no groups given)."""
    if not _unpaired_entry(entry):
        return "pairs"
    grouping = entry.get("grouping") if isinstance(entry.get("grouping"), dict) else {}
    return "episodes" if grouping.get("unit") == "group" else "rows"


def domain_sample(entry: dict, default: int | None = None) -> str | None:
    """The sample behind a domain accuracy in words, for an inconclusive reading.

    ``"60 pairs"`` (:func:`domain_pairs`, ``default`` pairs when the entry does not say),
    or for unpaired domains the rows and groups of each, ``"40 rows of A and 24 of B in 10
    and 6 groups"`` (``rows_used`` and ``grouping.groups``); ``None`` when unknown.
    """
    if _unpaired_entry(entry):
        grouping = entry.get("grouping") if isinstance(entry.get("grouping"), dict) else {}
        groups = grouping.get("groups") if grouping.get("unit") == "group" else None
        return _rows_of_a_and_b(entry.get("rows_used"), groups)
    pairs = domain_pairs(entry, default)
    return f"{pairs} pairs" if pairs else None


def _domain_row(m: dict, pairs: int | None) -> Row:
    accuracy, ci = m["accuracy"], interval(m.get("ci"))
    unpaired = _unpaired_entry(m)
    reading = read_domain_accuracy(accuracy, ci, small_sample=bool(m.get("small_sample")),
                                   sample=domain_sample(m, pairs))
    told = (f"a linear classifier tells domain A from domain B on {format_number(accuracy)} of held-out rows "
            f"(balanced accuracy)" if unpaired else
            f"a linear classifier tells clean from cluttered on {format_number(accuracy)} of held-out images")
    chance = format_number(CHANCE)
    separated = separates_domains(ci)
    if separated is None:
        why = f"{told}; without an interval chance ({chance}) is not ruled out"
    elif separated:
        why = f"{told} and its 95% interval lies above chance ({chance}), so the encoder separates the domains"
    elif ci[1] < CHANCE:
        leak = ("check that no scene is in both domains (score the same scenes paired)" if unpaired
                else "check that pairs are split by scene")
        why = f"{told} and its 95% interval lies below chance ({chance}), so {leak}"
    elif indistinguishable(ci):
        why = (f"{told} and its whole 95% interval lies within {format_number(DOMAIN_MARGIN, 2)} of chance "
               f"({chance}), so clutter is not separable beyond that margin")
    else:
        why = (f"{told}; its 95% interval includes chance ({chance}), so there is no evidence the encoder "
               f"separates the domains, but it is too wide to show invariance within "
               f"{format_number(DOMAIN_MARGIN, 2)}: more {sample_unit(m)} would settle it")
    return ("domain classifier accuracy", format_number(accuracy), format_interval(ci), f"{reading.words}: {why}")


def _mmd_row(m: dict) -> Row:
    p = format_p_value(m.get("p_value"))
    reading = read_mmd(m.get("p_value"))
    why = {
        DISTRIBUTIONS_DIFFER: "the clean and cluttered feature distributions are not the same",
        NO_DETECTABLE_DIFFERENCE: "this test did not tell the distributions apart, which is not evidence "
                                  "that they are the same",
    }.get(reading.words, "the permutation test did not report a p-value")
    return ("MMD^2", f"{format_number(m['mmd2'], 4)} ({p})", "",
            f"{reading.words}: {why} ({_mmd_null(m)}, {p}; its own bandwidth per encoder)")


def _mmd_null(m: dict) -> str:
    """How the MMD test's null was drawn: views swapped within pairs, or (the unpaired test,
    which records its ``null``) domain labels permuted over whole groups."""
    return "permutation of domain labels over whole groups" if m.get("null") else "within-pair permutation test"


def _drift_rows(m: dict) -> list[Row]:
    drift, top1 = m["relative_drift"], m.get("pair_retrieval_top1")
    rows = [
        ("mean relative drift", format_number(drift), format_interval(m.get("relative_drift_ci")),
         f"{read_relative_drift(drift).words}: on average clutter moves a scene's feature {format_number(drift)} "
         f"of the way a change of scene does (0 = invariant, 1 = as far as a different scene)"),
    ]
    if finite(top1) is not None:
        rows.append(("pair retrieval top-1", format_number(top1), "",
                     f"{read_pair_retrieval(top1).words}: {format_number(top1)} of cluttered images find their own "
                     f"clean image as the nearest clean feature"))
    return rows


def _cka_row(value: float) -> Row:
    return ("CKA (debiased)", format_number(value), "",
            f"{read_cka(value).words}: clean and cluttered representations align at {format_number(value)} "
            f"(1 = the same up to rotation and scale, about 0 = unrelated; debiased, so it can be negative)")


def _probe_row(label: str, m: dict) -> Row:
    unit = gap_unit(m)
    clean, cluttered, gap = (format_number(m.get(k)) for k in ("clean", "cluttered", "gap"))
    reading = read_probe(m)
    value = f"{clean} -> {cluttered} (gap {gap} {unit})"
    if reading.words == NOT_DECODABLE:
        baseline = format_number(m.get("baseline"))
        trained = ("a probe trained on domain A scores {} on held-out rows of A" if _unpaired_entry(m) else
                   "a probe trained on clean features scores {} on held-out clean scenes").format(clean)
        return (f"probe {label} ({m.get('metric')})", value, "",
                f"{NOT_DECODABLE}: {trained}, not above the no-feature baseline {baseline}, so its gap is left "
                f"out of the worst gap and the gate")
    scored = (f"a probe trained on domain A scores {clean} on held-out rows of A and {cluttered} on the rows "
              f"of B" if _unpaired_entry(m) else
              f"a probe trained on clean features scores {clean} on held-out clean and {cluttered} on the same "
              f"scenes cluttered")
    return (f"probe {label} ({m.get('metric')})", value, format_interval(m.get("gap_ci")),
            f"{reading.words}: {scored} (gap {gap} {unit})")


def _not_computable(title: str, value) -> Row | None:
    if isinstance(value, dict) and "not_computable" in value:
        return (title, "n/a", "", str(value["not_computable"]))
    return None


def _absent(metrics: dict, key: str) -> str | None:
    """The reason a metric was left out on purpose (``not_computed``), if one is given."""
    reasons = metrics.get("not_computed")
    if isinstance(reasons, dict) and key in reasons:
        return str(reasons[key])
    return None


def describe_metrics(metrics: dict, *, pairs: int | None = None) -> list[Row]:
    """Plain-language rows for the terminal table.

    Parameters
    ----------
    metrics : dict
        The ``metrics`` object of :func:`invariance.scoring.score_features`.
    pairs : int, optional
        Pairs measured, named in inconclusive readings when the metric does not say.

    Returns
    -------
    list of (name, value, interval, reading) tuples of str
        One row per metric (two for paired drift, one per probe); ``interval`` is the
        95% interval where the metric has one, else "". Each reading starts with the
        words the HTML report shows for the same number. A metric that could not be
        computed reads "n/a" with its reason. Accuracies and shares are fractions with
        three decimals, like everywhere else.
    """
    rows: list[Row] = []
    single = (
        ("domain_classifier", "domain classifier accuracy", lambda m: _domain_row(m, pairs)),
        ("mmd", "MMD^2", _mmd_row),
        ("paired_drift", "mean relative drift", _drift_rows),
        ("cka", "CKA (debiased)", _cka_row),
    )
    for key, title, describe in single:
        if key not in metrics:
            reason = _absent(metrics, key)
            if reason:
                rows.append((title, "n/a", "", f"not computed: {reason}"))
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


def subgroup_size(group) -> str:
    """A breakdown subgroup's size in words: its pairs, or ``"16 / 16 rows"`` (A / B) for
    unpaired domains; the terminal and the report both show it."""
    if not isinstance(group, dict):
        return DASH
    rows = group.get("rows")
    if "pairs" not in group and isinstance(rows, list) and len(rows) == 2:
        return f"{rows[0]} / {rows[1]} rows"
    return str(group.get("pairs", DASH))
