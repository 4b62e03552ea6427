"""Which encoder to try on hardware: ranking by the task information that survives clutter.

An encoder that forgets the task is trivially invariant, so invariance alone cannot rank
encoders for a policy. The rule here ranks by what the policy needs, the task information
left in the *cluttered* view, and keeps domain accuracy, MMD, drift and CKA as evidence:

1. **Carried tasks.** A task counts when at least one encoder's probe decodes it on clean
   views (``decodable``: its clean score is above the no-feature baseline at one-sided
   2.5%). A task no encoder decodes (a label the features cannot express) is left out and
   named.
2. **Skill on cluttered views.** Per carried task, the clean-trained probe's held-out
   cluttered score is turned into a skill score, (score - baseline) / (1 - baseline):
   the share of the way from the no-feature predictor (majority class, training mean) to
   a perfect probe (the generic skill score; Murphy, Mon. Wea. Rev. 116, 1988, from
   memory). It is scale-free, so accuracies and R^2 average on one footing; it is
   clipped to [0, 1] (below the baseline the probe carries no usable information). A
   task the encoder does not decode on clean scores 0.
3. **Aggregate.** The mean skill over carried tasks, with an interval whose ends are the
   means of the per-task interval ends: as wide as if the tasks' errors were perfectly
   correlated, so never narrower than the truth (conservative for the tie rule).
4. **Ties.** An encoder's rank is 1 + the number of encoders whose interval lies wholly
   above its own; encoders whose intervals overlap share a rank and are printed as tied.
5. **Collapsed** features (constant across images) rank last, are labelled, and fail the
   verdict and every gate. An encoder whose skill is below :data:`SKILL_FLOOR` on every
   carried task is *uninformative* ("invariant but uninformative" when clutter is not
   shown to separate its features).
6. **Without labels** the ranking falls back to invariance: the domain accuracy's interval
   (lower first, same tie rule), and the verdict says that this cannot tell a blind
   encoder from a robust one.
"""

from __future__ import annotations

from typing import NamedTuple, Sequence

from scipy.stats import binomtest

from invariance import readings
from invariance.results import display_name, metric_value

# Below this cluttered skill on every carried task an encoder is "uninformative": under a
# tenth of the way from the no-feature baseline to a perfect probe (common practice; the
# same bound as the lowest band of readings.BANDS["task_information"]).
SKILL_FLOOR = 0.1

# Two-sided level of the fallback interval of a cluttered accuracy (Clopper-Pearson).
_CONFIDENCE = 0.95

TASK_BASIS = "task information"
INVARIANCE_BASIS = "invariance"

BLIND_CAVEAT = ("Without task labels the ranking falls back to invariance (domain accuracy), which cannot "
                "tell a blind encoder from a robust one: features that ignore the image are perfectly "
                "invariant. Add task columns to labels.csv to rank by what the policy needs.")


class Skill(NamedTuple):
    """Task information on cluttered views: the point value and its 95% interval (0 to 1)."""

    value: float
    low: float
    high: float


class Assessment(NamedTuple):
    """What the ranking knows about one encoder.

    Attributes
    ----------
    information : Skill or None
        Mean cluttered skill over carried tasks (``None`` without carried tasks).
    tasks : dict of str to Skill
        Per carried task.
    collapsed : str or None
        Why the features count as collapsed, or ``None``.
    uninformative : bool
        Skill below :data:`SKILL_FLOOR` on every carried task.
    separable : bool or None
        Whether the domain accuracy's interval lies above chance.
    domain_ci : (float, float) or None
        The domain accuracy's 95% interval.
    label : str
        ``""``, ``"collapsed"``, ``"uninformative"`` or ``"invariant but uninformative"``.
    """

    information: Skill | None
    tasks: dict
    collapsed: str | None
    uninformative: bool
    separable: bool | None
    domain_ci: tuple | None
    label: str


class Ranking(NamedTuple):
    """Encoders in rank order with shared ranks for ties.

    Attributes
    ----------
    order : list of int
        Indices into the results, best first.
    ranks : dict of int to int
        Rank of each index (from 1); tied encoders share a rank.
    basis : str
        :data:`TASK_BASIS` or :data:`INVARIANCE_BASIS`.
    carried : list of str
        Tasks the ranking uses.
    dropped : list of str
        Tasks probed but not decodable on clean by any encoder.
    assessments : list of Assessment
        Per result, in input order.
    """

    order: list
    ranks: dict
    basis: str
    carried: list
    dropped: list
    assessments: list

    def tied(self, index: int) -> list[int]:
        """The other encoders that share ``index``'s rank."""
        return [i for i in self.order if i != index and self.ranks[i] == self.ranks[index]]

    def shown_rank(self, index: int) -> str:
        """The rank as printed: ``"2"``, or ``"2="`` when shared."""
        return f"{self.ranks[index]}{'=' if self.tied(index) else ''}"


# ---------------------------------------------------------------- collapse

_COLLAPSE_MARKS = (
    ("domain_classifier", "every feature is constant"),
    ("cka", "constant across rows"),
    ("cka_linear", "constant across rows"),
    ("paired_drift", "point the same way"),
    ("paired_drift", "all-zero feature vector"),
)


def collapse_reason(metrics: dict, warnings: Sequence[str] = ()) -> str | None:
    """Why the features count as collapsed (constant or all zero), or ``None``.

    Read from what scoring records when the features carry no variation: the domain
    classifier's note, CKA or drift left not computable for constant or zero features, or
    a warning that every feature column is constant.

    Parameters
    ----------
    metrics : dict
        A metrics object.
    warnings : sequence of str
        The result's warnings.

    Returns
    -------
    str or None
    """
    metrics = metrics if isinstance(metrics, dict) else {}
    for name, mark in _COLLAPSE_MARKS:
        entry = metrics.get(name)
        text = ""
        if isinstance(entry, dict):
            text = str(entry.get("not_computable") or entry.get("note") or "")
        if mark in text:
            return f"{name.replace('_', ' ')}: {text}"
    for warning in warnings or ():
        words = str(warning).split()
        # "<k> of <d> feature columns are constant over all images" with k = d
        if len(words) > 3 and words[1] == "of" and words[0] == words[2] and "constant" in warning:
            return str(warning)
    return None


# ---------------------------------------------------------------- skill

def _score_interval(entry: dict, score: float) -> tuple[float, float]:
    """95% interval of the held-out cluttered score.

    ``cluttered_ci`` when the result has it (unpaired probes store it); otherwise, for
    accuracy, the exact Clopper-Pearson interval (Clopper & Pearson, Biometrika 26, 1934;
    scipy.stats.binomtest) over the rows that score was measured on: the held-out pairs
    (``n_test``), or for an unpaired probe the rows of B (``n_test_b``; its ``n_test``
    counts A's held-out rows). For R^2 the gap interval's half-width around the score
    (the clean score on clean views varies far less than the cluttered one, so the gap's
    spread is mostly the cluttered score's; an approximation until the result stores
    ``cluttered_ci``).
    """
    stored = readings.interval(entry.get("cluttered_ci"))
    if stored is not None:
        return stored
    n_test = entry.get("n_test_b", entry.get("n_test"))
    if entry.get("metric") == "accuracy" and isinstance(n_test, int) and not isinstance(n_test, bool) and n_test > 0:
        correct = int(round(min(1.0, max(0.0, score)) * n_test))
        ci = binomtest(correct, n_test).proportion_ci(_CONFIDENCE, method="exact")
        return float(ci.low), float(ci.high)
    gap_ci = readings.interval(entry.get("gap_ci"))
    half = (gap_ci[1] - gap_ci[0]) / 2 if gap_ci is not None else 0.0
    return score - half, score + half


def task_skill(entry: dict) -> Skill | None:
    """Cluttered-view skill of one probe, (score - baseline) / (1 - baseline), in [0, 1].

    Parameters
    ----------
    entry : dict
        One probe entry (``metric``, ``cluttered``, ``baseline``, ...).

    Returns
    -------
    Skill or None
        ``None`` when the score or baseline is missing (an accuracy without a stored
        baseline; an R^2 takes 0, the training mean's R^2 up to the split). A task the
        probe does not decode on clean gives 0.
    """
    if not isinstance(entry, dict) or "not_computable" in entry:
        return None
    score = readings.finite(entry.get("cluttered"))
    baseline = readings.finite(entry.get("baseline"))
    if baseline is None and entry.get("metric") == "r2":
        baseline = 0.0
    if score is None or baseline is None or baseline >= 1.0:
        return None
    if not readings.probe_decodable(entry):
        return Skill(0.0, 0.0, 0.0)
    low, high = _score_interval(entry, score)

    def skill(value: float) -> float:
        return min(1.0, max(0.0, (value - baseline) / (1.0 - baseline)))

    return Skill(skill(score), skill(low), skill(high))


def _probes(metrics: dict) -> dict:
    probes = metrics.get("probe") if isinstance(metrics, dict) else None
    if not isinstance(probes, dict) or "not_computable" in probes:
        return {}
    return {str(k): v for k, v in probes.items() if isinstance(v, dict) and "not_computable" not in v}


def carried_tasks(metrics_list: Sequence[dict], collapsed: Sequence[bool]) -> tuple[list[str], list[str]]:
    """Tasks decodable on clean by at least one encoder that has not collapsed, and the others.

    Returns
    -------
    (carried, dropped) : lists of str
        In first-seen order.
    """
    seen, carried = [], set()
    for metrics, flat in zip(metrics_list, collapsed):
        for task, entry in _probes(metrics).items():
            if task not in seen:
                seen.append(task)
            if not flat and readings.probe_decodable(entry) and task_skill(entry) is not None:
                carried.add(task)
    return [t for t in seen if t in carried], [t for t in seen if t not in carried]


def assess(metrics: dict, carried: Sequence[str], *, warnings: Sequence[str] = ()) -> Assessment:
    """The ranking's view of one encoder's metrics (see the module docstring).

    Parameters
    ----------
    metrics : dict
        A metrics object.
    carried : sequence of str
        The tasks of the comparison (:func:`carried_tasks`).
    warnings : sequence of str
        The result's warnings (a collapse may only show there).

    Returns
    -------
    Assessment
    """
    collapsed = collapse_reason(metrics, warnings)
    probes = _probes(metrics)
    tasks = {}
    for task in carried:
        found = task_skill(probes[task]) if task in probes else None
        tasks[task] = found if found is not None and not collapsed else Skill(0.0, 0.0, 0.0)
    information = None
    if tasks:
        k = len(tasks)
        information = Skill(*(sum(s[j] for s in tasks.values()) / k for j in range(3)))
    domain_ci = _domain_interval(metrics)
    separable = readings.separates_domains(domain_ci)
    uninformative = bool(tasks) and all(s.value < SKILL_FLOOR for s in tasks.values())
    label = "collapsed" if collapsed else ""
    if not collapsed and uninformative:
        label = "uninformative" if separable else "invariant but uninformative"
    return Assessment(information, tasks, collapsed, uninformative, separable, domain_ci, label)


# ---------------------------------------------------------------- ranking

def _domain_interval(metrics: dict) -> tuple[float, float] | None:
    entry = metrics.get("domain_classifier") if isinstance(metrics, dict) else None
    return readings.interval(entry.get("ci")) if isinstance(entry, dict) and "not_computable" not in entry else None


def _dominated_by(i: int, others: Sequence[int], intervals: dict, higher_better: bool) -> int:
    """How many of ``others`` have an interval wholly better than ``i``'s."""
    mine = intervals.get(i)
    if mine is None:
        return sum(intervals.get(k) is not None for k in others)
    if higher_better:
        return sum(1 for k in others if intervals.get(k) is not None and intervals[k][0] > mine[1])
    return sum(1 for k in others if intervals.get(k) is not None and intervals[k][1] < mine[0])


def rank(results: Sequence[dict]) -> Ranking:
    """Rank encoders by the task information that survives clutter (see the module docstring).

    Parameters
    ----------
    results : sequence of dict
        ``invariance.result/1`` objects.

    Returns
    -------
    Ranking
    """
    metrics = [r.get("metrics") if isinstance(r.get("metrics"), dict) else {} for r in results]
    warnings = [r.get("warnings") if isinstance(r.get("warnings"), list) else [] for r in results]
    flat = [collapse_reason(m, w) is not None for m, w in zip(metrics, warnings)]
    carried, dropped = carried_tasks(metrics, flat)
    assessments = [assess(m, carried, warnings=w) for m, w in zip(metrics, warnings)]
    basis = TASK_BASIS if carried else INVARIANCE_BASIS
    if basis == TASK_BASIS:
        intervals = {i: (a.information.low, a.information.high) for i, a in enumerate(assessments)
                     if a.information is not None and not a.collapsed}

        def key(i):
            info = assessments[i].information
            return (flat[i], info is None, -(info.value if info else 0.0), i)
    else:
        intervals = {i: _domain_interval(m) for i, m in enumerate(metrics) if not flat[i]}
        intervals = {i: v for i, v in intervals.items() if v is not None}

        def key(i):
            accuracy = metric_value(metrics[i], "domain_classifier", "accuracy")
            drift = metric_value(metrics[i], "paired_drift", "relative_drift")
            return (flat[i], accuracy is None, round(accuracy, 3) if accuracy is not None else 0.0,
                    drift if drift is not None else float("inf"), i)
    order = sorted(range(len(results)), key=key)
    live = [i for i in order if not flat[i]]
    ranks = {i: 1 + _dominated_by(i, [k for k in live if k != i], intervals, basis == TASK_BASIS) for i in live}
    for i in order:
        if flat[i]:
            ranks[i] = len(live) + 1
    return Ranking(order, ranks, basis, carried, dropped, assessments)


# ---------------------------------------------------------------- verdict

Piece = tuple[str, bool]


def _skill_text(skill: Skill) -> str:
    return f"{readings.format_number(skill.value)} [{readings.format_number(skill.low)}, " \
           f"{readings.format_number(skill.high)}]"


def worst_carried_gap(metrics: dict, carried: Sequence[str] | None = None) -> tuple[str, dict] | None:
    """``(task, entry)`` of the decodable probe with the largest gap's upper bound.

    Accuracy gaps and R^2 gaps are in different units, so the worst is taken within the
    unit of the task with the largest upper bound over the 95% interval (the point gap
    without an interval); tasks not decodable on clean are left out.
    """
    candidates = []
    for task, entry in _probes(metrics).items():
        if (carried is not None and task not in carried) or not readings.probe_decodable(entry):
            continue
        gap = readings.finite(entry.get("gap"))
        ci = readings.interval(entry.get("gap_ci"))
        if gap is not None:
            candidates.append(((ci[1] if ci else gap), task, entry))
    if not candidates:
        return None
    _, task, entry = max(candidates, key=lambda c: c[0])
    return task, entry


def _unit(result: dict) -> str:
    """``"pairs"``, or ``"episodes"``/``"rows"`` for unpaired domains (readings.sample_unit)."""
    entry = (result.get("metrics") or {}).get("domain_classifier")
    return readings.sample_unit(entry) if isinstance(entry, dict) else "pairs"


def _evidence(metrics: dict, n_pairs) -> str:
    entry = metrics.get("domain_classifier")
    accuracy = metric_value(metrics, "domain_classifier", "accuracy")
    if accuracy is None or not isinstance(entry, dict):
        return "its domain accuracy is not computable"
    ci = readings.interval(entry.get("ci"))
    words = readings.read_domain_accuracy(accuracy, ci, sample=readings.domain_sample(entry, n_pairs)).words
    return f"clutter reads {words} in its features (domain accuracy {readings.format_number(accuracy)} " \
           f"{readings.format_interval(ci)})"


def _best_sentence(results, ranking: Ranking, names) -> list[Piece]:
    best = ranking.order[0]
    a = ranking.assessments[best]
    tasks = ", ".join(ranking.carried)
    if a.collapsed:
        return [("No encoder can be recommended: every encoder's features are constant.", False)]
    if a.uninformative:
        return [("No encoder keeps task information under clutter: ", True),
                (f"on cluttered views every encoder's probes stay within {SKILL_FLOOR} of the no-feature "
                 f"baseline on {tasks}, so none is worth a hardware trial on this evidence.", False)]
    metrics = results[best].get("metrics") or {}
    where = ("on domain B its probes trained on domain A" if results[best].get("pairing") == "unpaired" else
             "on cluttered views its clean-trained probes")
    text = (f"{where} keep {_skill_text(a.information)} of the task "
            f"information ({readings.read_task_information(a.information.value).words}; mean skill over "
            f"{tasks}, 1 = perfect, 0 = no better than the no-feature baseline); "
            f"{_evidence(metrics, (results[best].get('dataset') or {}).get('pairs'))}.")
    if len(results) == 1:
        return [(names[best], True), (": " + text, False)]
    return [("Try ", False), (names[best], True), (" first on hardware: " + text, False)]


def _shown(ranking: Ranking, i: int) -> str:
    if ranking.basis == TASK_BASIS:
        info = ranking.assessments[i].information
        return _skill_text(info) if info is not None else "no task information"
    return "domain accuracy " + readings.format_interval(ranking.assessments[i].domain_ci)


def _order_sentence(results, ranking: Ranking, names) -> str | None:
    best = ranking.order[0]
    if len(ranking.order) < 2 or ranking.assessments[best].collapsed:
        return None
    tied = ranking.tied(best)
    if tied:
        listed = "; ".join(f"{names[i]}, {_shown(ranking, i)}" for i in tied)
        return (f"Its interval overlaps those of {listed}, so they share rank 1: the point estimates put "
                f"{names[best]} ahead, but this data does not settle the order (more {_unit(results[best])} "
                f"would narrow the intervals).")
    second = ranking.order[1]
    return (f"Its interval lies wholly above that of the next, {names[second]} ({_shown(ranking, second)}), "
            f"so first place is clear on this data.")


def _loss_sentence(results, ranking: Ranking, names) -> str | None:
    best = ranking.order[0]
    if ranking.assessments[best].collapsed or ranking.assessments[best].uninformative:
        return None
    worst = worst_carried_gap(results[best].get("metrics") or {}, ranking.carried)
    if worst is None:
        return None
    task, entry = worst
    return (f"Its largest loss under clutter is on \u201c{task}\u201d: gap {readings.format_number(entry.get('gap'))} "
            f"{readings.gap_unit(entry)} {readings.format_interval(entry.get('gap_ci'))} "
            f"({readings.read_probe(entry).words}).")


def _label_sentences(ranking: Ranking, names) -> list[str]:
    out = []
    for i in ranking.order:
        a = ranking.assessments[i]
        if a.collapsed:
            out.append(f"{names[i]} has collapsed ({a.collapsed}): its features do not vary with the image, so "
                       "it ranks last and fails every gate.")
        elif a.label == "invariant but uninformative":
            out.append(f"{names[i]} is invariant but uninformative: clutter is not shown to separate its "
                       f"features, but its probes keep less than {SKILL_FLOOR} skill on every carried task.")
        elif a.label == "uninformative":
            out.append(f"{names[i]} is uninformative under clutter: its probes keep less than {SKILL_FLOOR} "
                       f"skill on every carried task on cluttered views.")
    return out


def verdict(results: Sequence[dict], ranking: Ranking | None = None,
            names: Sequence[str] | None = None) -> list[list[Piece]]:
    """The summary in plain sentences: which encoder to try on hardware and why.

    Parameters
    ----------
    results : sequence of dict
        ``invariance.result/1`` objects (at least one).
    ranking : Ranking, optional
        From :func:`rank`; computed when not given.
    names : sequence of str, optional
        Display names; by default from the results.

    Returns
    -------
    list of list of (text, strong)
        Sentences as pieces, ``strong`` for the words to set in bold; the terminal joins
        them, the report sets them.
    """
    ranking = ranking or rank(results)
    names = list(names) if names is not None else [display_name(r) for r in results]
    sentences: list[list[Piece]] = []
    if ranking.basis == TASK_BASIS:
        sentences.append(_best_sentence(results, ranking, names))
        for extra in (_loss_sentence(results, ranking, names), _order_sentence(results, ranking, names)):
            if extra:
                sentences.append([(extra, False)])
    else:
        best = ranking.order[0]
        metrics = results[best].get("metrics") or {}
        if ranking.assessments[best].collapsed:
            sentences.append([("No encoder can be recommended: every encoder's features are constant.", False)])
        else:
            head = "Ranked first by invariance" if len(results) > 1 else "By invariance alone"
            sentences.append([(names[best], True), (f": {head.lower()}, "
                              f"{_evidence(metrics, (results[best].get('dataset') or {}).get('pairs'))}.", False)])
            order = _order_sentence(results, ranking, names)
            if order:
                sentences.append([(order, False)])
        caveat = BLIND_CAVEAT
        if ranking.dropped:
            caveat = caveat.replace("Without task labels", "With no task label decodable on clean by any encoder")
        sentences.append([(caveat, True)])
    sentences += [[(s, False)] for s in _label_sentences(ranking, names)]
    if ranking.dropped:
        sentences.append([(f"Not decodable on clean by any encoder, so left out of the ranking and the worst gap: "
                           f"{', '.join(ranking.dropped)}.", False)])
    return sentences


def plain(sentences: list[list[Piece]]) -> str:
    """The verdict as one paragraph of plain text."""
    return " ".join("".join(text for text, _ in sentence) for sentence in sentences)
