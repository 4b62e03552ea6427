"""Linear probes: does the task information in the features survive clutter?

A probe is fitted on clean features of training pairs and scored on the held-out pairs,
once on their clean and once on their cluttered features; the gap is the difference.
A paired bootstrap over the held-out pairs gives the gap's interval, and the clean score
is compared with a predictor that ignores the features (the baseline): a task whose
clean score is not clearly above it is not decodable, and its gap says nothing.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy.stats import binomtest, norm
from scipy.stats import t as student_t
from sklearn.linear_model import LogisticRegression, RidgeCV
from sklearn.model_selection import GroupShuffleSplit, train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from invariance.errors import InvarianceError
from invariance.metrics.domain import _check_int, _validate_pairs, _validate_samples, check_groups

# Labelled pairs below which a held-out score says little (common practice).
MIN_LABELLED_PAIRS = 10

# Ridge strengths searched by efficient leave-one-out, half a decade apart from 1e-3 to
# 1e5: the weak end for informative labels on standardised features, the strong end so a
# label the features do not predict gets a near-constant model instead of an over-fitted
# one (common practice). The one grid for every linear probe and task head.
RIDGE_ALPHAS = tuple(np.logspace(-3, 5, 17))

# scikit-learn's default inverse regularisation for the logistic probe (common practice).
PROBE_C = 1.0

# Bootstrap resamples of the held-out pairs for the gap's interval and the decodability
# check; 2,000 is a usual choice for a 95% percentile interval (Efron & Tibshirani, "An
# Introduction to the Bootstrap", 1993, ch. 13, advise >= 1,000 for intervals, from memory).
BOOTSTRAP_RESAMPLES = 2000

# Two-sided 95% intervals.
_CONFIDENCE = 0.95

# The note of a task whose clean score is not significantly above the baseline.
NOT_DECODABLE = "not decodable on clean"

# About 4 million resampled indices (and gathered values) in memory at a time.
_BOOTSTRAP_CELLS = 2**22

_MAX_ITER = 2000


def make_probe(kind, *, standardise=True):
    """The one linear probe, unfitted: logistic regression for classes, RidgeCV for numbers.

    Parameters
    ----------
    kind : {"classification", "regression"}
    standardise : bool, default=True
        Put a StandardScaler in front; ``False`` gives the bare linear model, for callers
        that standardise themselves (the alignment's warm-started task heads).

    Returns
    -------
    estimator
        A scikit-learn estimator whose ``score`` is accuracy or R^2.
    """
    if kind not in ("classification", "regression"):
        raise InvarianceError(f"kind={kind!r} is not valid; pass 'classification' or 'regression'")
    if kind == "classification":
        model = LogisticRegression(C=PROBE_C, max_iter=_MAX_ITER)
    else:
        model = RidgeCV(alphas=RIDGE_ALPHAS)
    return make_pipeline(StandardScaler(), model) if standardise else model


def _kind(values):
    if values.dtype.kind in "fiu":
        return "regression"
    return "classification"


def _labelled(values, kind):
    """Boolean mask of pairs with a label (NaN numbers and empty or None classes are missing)."""
    if kind == "regression":
        return np.isfinite(values.astype(np.float64))
    return np.array([v is not None and str(v) != "" and str(v).lower() != "nan" for v in values])


def _split(idx, y, kind, seed, test_fraction):
    """Seeded split of pair indices, stratified by class when every class has 2 pairs."""
    note = None
    stratify = None
    if kind == "classification":
        classes, counts = np.unique(y, return_counts=True)
        n_test = int(np.ceil(test_fraction * len(y)))  # train_test_split rounds up
        if counts.min() >= 2 and min(n_test, len(y) - n_test) >= len(classes):
            stratify = y
        else:
            note = "split not stratified: some classes have too few pairs"
    train, test = train_test_split(
        idx, test_size=test_fraction, random_state=seed, stratify=stratify
    )
    return np.sort(train), np.sort(test), note


def _labels(values, n_pairs):
    """(kind, labelled pair indices, labels), or a ``not_computable`` dict."""
    values = np.asarray(values)
    if values.ndim != 1 or values.shape[0] != n_pairs:
        raise InvarianceError(
            f"a task label array has shape {values.shape}; it needs one value per pair "
            f"({n_pairs}): give labels in the same order as the features"
        )
    kind = _kind(values)
    mask = _labelled(values, kind)
    idx = np.flatnonzero(mask)
    if idx.size < MIN_LABELLED_PAIRS:
        return {
            "not_computable": f"only {idx.size} labelled pairs; need {MIN_LABELLED_PAIRS}"
        }
    y = values[idx].astype(np.float64) if kind == "regression" else values[idx].astype(str)
    if kind == "regression":
        # R^2 does not change when the target is divided by a constant, and a target near
        # 1e300 would overflow when squared: fit on y / max|y|
        y = y / max(float(np.max(np.abs(y))), np.finfo(float).tiny)
    if np.unique(y).size < 2:
        what = "one class" if kind == "classification" else "a constant value"
        return {"not_computable": f"the label has {what} only, so there is nothing to predict"}
    return kind, idx, y


# Seeded group splits tried until the label varies on both sides (a class may live in a
# few episodes only, so one draw can hold out a single class; common practice).
_GROUP_SPLIT_TRIES = 20


def _group_split(idx, groups, seed, test_fraction, y=None):
    """Seeded split of whole groups (episodes): no group has rows on both sides.

    scikit-learn's GroupShuffleSplit, not stratified by class; with labels ``y`` the first
    of up to 20 seeded draws in which the label varies on both sides is taken (else the
    first draw, which the caller then reports as not computable).
    """
    splitter = GroupShuffleSplit(n_splits=_GROUP_SPLIT_TRIES, test_size=test_fraction, random_state=seed)
    splits = list(splitter.split(idx, groups=groups))
    chosen = splits[0]
    if y is not None:
        varied = [s for s in splits if np.unique(y[s[0]]).size > 1 and np.unique(y[s[1]]).size > 1]
        chosen = varied[0] if varied else chosen
    return np.sort(chosen[0]), np.sort(chosen[1]), "split grouped by episode (not stratified)"


def _probe_one(clean, cluttered, values, seed, test_fraction, resamples, groups=None):
    labels = _labels(values, clean.shape[0])
    if isinstance(labels, dict):
        return labels
    kind, idx, y = labels
    if groups is None:
        pos_train, pos_test, note = _split(np.arange(idx.size), y, kind, seed, test_fraction)
    elif np.unique(groups[idx]).size < 2:
        return {"not_computable": "the labelled pairs come from one group (episode); a grouped split needs 2"}
    else:
        pos_train, pos_test, note = _group_split(np.arange(idx.size), groups[idx], seed, test_fraction, y)
    if np.unique(y[pos_train]).size < 2 or np.unique(y[pos_test]).size < 2:
        return {
            "not_computable": "classes too rare to split into training and held-out pairs "
            "that both vary; add labelled pairs"
        }
    train, test = idx[pos_train], idx[pos_test]
    model = make_probe(kind)
    model.fit(clean[train], y[pos_train])
    y_test = y[pos_test]
    preds = {
        "clean": model.predict(clean[test]),
        "cluttered": model.predict(cluttered[test]),
        "baseline": np.full(test.size, _constant_prediction(y[pos_train], kind)),
    }
    point = {name: _score(kind, y_test, p) for name, p in preds.items()}
    test_groups = None if groups is None else np.unique(groups[test], return_inverse=True)[1]
    gap_ci, margin_low, clean_se, cluttered_se = _bootstrap(kind, y_test, preds, point, seed, resamples,
                                                            test_groups)
    decodable = bool(margin_low > 0)
    out = {
        "kind": kind,
        "metric": "accuracy" if kind == "classification" else "r2",
        "clean": point["clean"],
        "cluttered": point["cluttered"],
        "gap": point["clean"] - point["cluttered"],
        "gap_ci": gap_ci,
        "clean_se": clean_se,
        "cluttered_se": cluttered_se,
        "ci_method": _CI_METHOD[kind].format(resamples) + ("" if groups is None else "; groups (episodes) resampled"),
        "baseline": point["baseline"],
        "decodable": decodable,
        "n_train": int(train.size),
        "n_test": int(test.size),
    }
    notes = [note] if note else []
    if not decodable:
        notes.append(NOT_DECODABLE)
    if notes:
        out["note"] = "; ".join(notes)
    return out


def _constant_prediction(y_train, kind):
    """The no-feature predictor fitted on the training pairs: majority class or mean."""
    if kind == "regression":
        return float(y_train.mean())
    classes, counts = np.unique(y_train, return_counts=True)
    return classes[np.argmax(counts)]  # ties go to the first class in sorted order


def _score(kind, y_true, y_pred):
    """Accuracy, or R^2 = 1 - SS_res / SS_tot (scikit-learn's accuracy_score and r2_score,
    without their input checks; the held-out labels vary, so SS_tot > 0)."""
    if kind == "classification":
        return float(np.mean(y_pred == y_true))
    ss_tot = float(((y_true - y_true.mean()) ** 2).sum())
    return 1.0 - float(((y_true - y_pred) ** 2).sum()) / ss_tot


def _resampled_scores(kind, y, preds, idx):
    """Accuracy or R^2 of each prediction on each resample (rows of ``idx``) of the pairs.

    R^2 is 1 - SS_res / SS_tot on the resample (scikit-learn's r2_score); a resample whose
    labels are all equal has no SS_tot and gives NaN, left out of the percentiles.
    """
    if kind == "classification":
        return {name: (p == y)[idx].mean(axis=1) for name, p in preds.items()}
    y_res = y[idx]
    ss_tot = ((y_res - y_res.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
    # equal labels test by range: their mean can differ from them in the last bit
    ss_tot[np.ptp(y_res, axis=1) == 0] = np.nan
    return {name: 1.0 - ((y - p) ** 2)[idx].sum(axis=1) / ss_tot for name, p in preds.items()}


@lru_cache(maxsize=256)  # scipy's t quantile costs about a millisecond a call
def _expanded_levels(m):
    """Percentile levels of the expanded percentile interval (Hesterberg 2015).

    The plain percentile interval of a mean is too narrow in small samples (it uses the
    normal quantile and the 1/m variance); the expanded interval takes the percentiles
    at the level alpha' whose normal quantile is sqrt(m / (m - 1)) t_{m-1}, the
    t-interval's width (Hesterberg, "What teachers should know about the bootstrap",
    The American Statistician 69, 2015; formula from memory). Measured coverage of the
    true gap 0 of accuracy gaps under paired nulls, 18-120 held-out pairs: 94.4-100%;
    BCa 89.6-99.7% (tests/benchmarks/bench_coverage.py).
    """
    tail = (1.0 - _CONFIDENCE) / 2.0
    z = np.sqrt(m / (m - 1.0)) * student_t.ppf(1.0 - tail, m - 1)
    low = float(norm.cdf(-z))
    return 100.0 * low, 100.0 * (1.0 - low)


def _resampled_differences(kind, y, preds, seed, resamples):
    """Gap (clean - cluttered) and margin (clean - baseline) on each resample of the pairs.

    Every resample of the held-out pairs rescores the same fixed predictions of the
    clean, cluttered and baseline predictor on the same pairs (paired bootstrap; Efron &
    Tibshirani, "An Introduction to the Bootstrap", 1993, ch. 13).
    """
    rng = np.random.default_rng(seed)
    m = y.size
    chunk = max(1, _BOOTSTRAP_CELLS // m)
    gaps, margins, cleans = [], [], []
    for start in range(0, resamples, chunk):
        idx = rng.integers(0, m, size=(min(chunk, resamples - start), m))
        res = _resampled_scores(kind, y, preds, idx)
        gaps.append(res["clean"] - res["cluttered"])
        margins.append(res["clean"] - res["baseline"])
        cleans.append(res["clean"])
    gaps, margins, cleans = np.concatenate(gaps), np.concatenate(margins), np.concatenate(cleans)
    # the held-out labels vary (checked before, so m >= 2): a resample with no SS_tot
    # has probability at most 1/2 per draw (2 pairs, two values); some are always left
    ok = np.isfinite(gaps)
    return gaps[ok], margins[ok], cleans[ok]


def _interval(values, point, m, symmetric):
    """95% expanded percentile interval of ``values``; ``symmetric``: point +- half its width.

    R^2 gaps are ratios of sums of products of prediction errors, heavy-tailed enough
    that with tens of held-out pairs the resampled values lean to whichever side the
    sample's few large terms fall: under paired nulls with 18-120 held-out pairs the
    asymmetric interval covered the true gap 0 in 91.3-95.3% of runs (plain percentile
    89.3-95.1%, BCa 91.7-95.1%), the symmetric one (the same width centred on the
    estimate, as a t-interval is) in 94.2-99.3% (tests/benchmarks/bench_coverage.py).
    """
    low, high = np.percentile(values, _expanded_levels(m))
    if symmetric:
        half = (high - low) / 2.0
        low, high = point - half, point + half
    return float(low), float(high)


def _weighted_scores(kind, y, preds, W):
    """Accuracy or R^2 of each prediction under each row-weight vector (rows of ``W``).

    A cluster bootstrap resample is a multiplicity per row (its group's draw count), so
    the scores are weighted sums; R^2 = 1 - sum w (y - p)^2 / sum w (y - ybar_w)^2.
    """
    total = W.sum(axis=1)
    if kind == "classification":
        return {name: (W @ (p == y)) / total for name, p in preds.items()}
    mean = (W @ y) / total
    ss_tot = W @ (y**2) - total * mean**2
    ss_tot[ss_tot <= 1e-12 * np.maximum(W @ (y**2), 1e-300)] = np.nan
    return {name: 1.0 - (W @ ((y - p) ** 2)) / ss_tot for name, p in preds.items()}


def _group_differences(kind, y, preds, groups, seed, resamples):
    """Gap, margin and clean score per cluster-bootstrap resample: whole groups drawn with
    replacement (Davison & Hinkley, Bootstrap Methods and their Application, 1997, section 3.8)."""
    G = int(groups.max()) + 1
    counts = np.random.default_rng(seed).multinomial(G, np.full(G, 1.0 / G), size=resamples)
    res = _weighted_scores(kind, y, preds, counts[:, groups].astype(np.float64))
    gaps, margins = res["clean"] - res["cluttered"], res["clean"] - res["baseline"]
    ok = np.isfinite(gaps)
    return gaps[ok], margins[ok], res["clean"][ok]


def _bootstrap(kind, y, preds, point, seed, resamples, groups=None):
    """95% interval of the gap, the lower end of the clean score's margin over baseline, and
    the clean and the cluttered scores' bootstrap standard errors.

    With groups the resampled unit, and the m of the expanded interval, is the group. A
    standard error is the standard deviation of the resampled scores (Efron & Tibshirani
    1993, ch. 6): it assumes nothing about the errors' distribution, where the
    normal-theory variance of R^2 is too small with heavy-tailed errors. The cluttered
    score of a resample is its clean score less its gap (the same resampled pairs).
    """
    if groups is None:
        gaps, margins, cleans = _resampled_differences(kind, y, preds, seed, resamples)
        m = y.size
    else:
        gaps, margins, cleans = _group_differences(kind, y, preds, groups, seed, resamples)
        m = max(int(groups.max()) + 1, 2)
    symmetric = kind == "regression"
    gap = _interval(gaps, point["clean"] - point["cluttered"], m, symmetric)
    margin = _interval(margins, point["clean"] - point["baseline"], m, symmetric)
    return list(gap), margin[0], float(np.std(cleans, ddof=1)), float(np.std(cleans - gaps, ddof=1))


_CI_METHOD = {
    "classification": "expanded percentile bootstrap over held-out pairs, {} resamples, 95%",
    "regression": "symmetric expanded percentile bootstrap over held-out pairs (the gap +- "
    "half the interval's width), {} resamples, 95%",
}


def linear_probes(
    clean, cluttered, tasks, *, seed=0, test_fraction=0.3, resamples=BOOTSTRAP_RESAMPLES, groups=None
):
    """Fit linear probes on clean training pairs; score on held-out clean and cluttered.

    Classes (``str`` or object arrays): StandardScaler + logistic regression, accuracy.
    Numbers (numeric arrays): StandardScaler + RidgeCV, R^2. The split is over pairs,
    seeded, stratified by class where every class has at least two pairs, so the
    held-out clean and cluttered scores are on the same scenes (common practice for
    linear probing; Alain & Bengio, "Understanding intermediate layers using linear
    classifier probes", 2016).

    Parameters
    ----------
    clean, cluttered : ndarray of shape (n_pairs, d)
        Paired features; row i of each is the same scene.
    tasks : dict of str to ndarray of shape (n_pairs,)
        Label per pair for each task. Missing labels (NaN, None, "") are left out.
    seed : int, default=0
        Seed of the train/test split and of the bootstrap: the seed fixes every output.
    test_fraction : float, default=0.3
        Fraction of labelled pairs held out, in (0, 1).
    resamples : int, default=2000
        Bootstrap resamples of the held-out pairs (>= 100).
    groups : array-like of shape (n_pairs,), optional
        Group (episode) of each pair: the split keeps whole groups on one side
        (GroupShuffleSplit, not stratified) and the bootstrap resamples whole held-out
        groups, with the expanded interval's m the number of held-out groups.

    Returns
    -------
    dict of str to dict
        Per task: ``kind``, ``metric`` ("accuracy" or "r2"), ``clean``, ``cluttered``,
        ``gap`` (clean - cluttered), ``gap_ci`` (95% interval of the gap from a paired
        bootstrap over the held-out pairs: each resample rescores the clean and the
        cluttered predictions on the same pairs; the expanded percentile interval for
        accuracy, the same width centred on the gap for R^2; Efron & Tibshirani 1993,
        Hesterberg 2015), ``clean_se`` (the clean score's standard error: the standard
        deviation of the same resamples' clean scores), ``cluttered_se`` (the same for
        the cluttered score),
        ``ci_method``, ``baseline`` (score of the no-feature predictor fitted on the
        training pairs: the rate of the training majority class among the held-out
        pairs, or the R^2 of predicting the training mean, <= 0), ``decodable`` (the
        lower end of the same 95% interval of clean - baseline is above 0: the clean
        score is above the baseline at one-sided level 2.5%), ``n_train``, ``n_test`` and,
        when there is one, ``note`` ("split not stratified ...", "not decodable on
        clean", joined by "; "); or ``{"not_computable": reason}`` when the label cannot
        be probed.
    """
    if not isinstance(tasks, dict):
        raise InvarianceError(
            f"tasks must be a dict of label name to array; got {type(tasks).__name__}"
        )
    try:
        test_fraction = float(test_fraction)
    except (TypeError, ValueError):
        test_fraction = float("nan")
    if not 0.0 < test_fraction < 1.0:
        raise InvarianceError(
            f"test_fraction must be between 0 and 1 (exclusive); got {test_fraction!r}"
        )
    _check_int("seed", seed, 0)
    _check_int("resamples", resamples, 100)
    clean, cluttered = _validate_pairs(clean, cluttered)
    groups = check_groups(groups, clean.shape[0])
    return {
        str(name): _probe_one(clean, cluttered, values, seed, test_fraction, resamples, groups)
        for name, values in tasks.items()
    }


def _unpaired_resamples(kind, parts, seed, resamples):
    """Gap (A held-out - B), margin (A held-out - baseline) and B's score per cluster-bootstrap resample.

    The held-out rows of A and the rows of B are independent samples, so each is resampled
    by its own groups (Davison & Hinkley 1997, section 3.8); the baseline rides on A's.
    """
    rng = np.random.default_rng(seed)
    scores = {}
    for side, (y, preds, groups) in parts.items():
        G = int(groups.max()) + 1
        counts = rng.multinomial(G, np.full(G, 1.0 / G), size=resamples)
        scores[side] = _weighted_scores(kind, y, preds, counts[:, groups].astype(np.float64))
    gaps = scores["a"]["model"] - scores["b"]["model"]
    margins = scores["a"]["model"] - scores["a"]["baseline"]
    ok = np.isfinite(gaps) & np.isfinite(margins)
    b_scores = scores["b"]["model"]
    return gaps[ok], margins[ok], b_scores[np.isfinite(b_scores)]


def _b_score_interval(kind, b_scores, point, n_groups, n_rows):
    """95% interval of B's score and how it was made (the result's ``cluttered_ci``).

    The cluster bootstrap over B's groups (expanded percentile, symmetric for R^2 as the
    gap's) counts episodes, as every interval here does. For accuracy it is widened to
    contain the exact Clopper-Pearson interval over B's rows (Clopper & Pearson,
    Biometrika 26, 1934; scipy.stats.binomtest): the binomial floor of independent rows,
    which the bootstrap misses at 0 or 1 correct (a zero-width interval) and in few groups.
    """
    low, high = _interval(b_scores, point, max(n_groups, 2), kind == "regression")
    method = (f"cluster bootstrap over the {n_groups} groups of B, expanded percentile"
              f"{', symmetric' if kind == 'regression' else ''}, {b_scores.size} resamples, 95%")
    if kind == "classification":
        exact = binomtest(int(round(point * n_rows)), n_rows).proportion_ci(_CONFIDENCE, method="exact")
        low, high = min(low, float(exact.low)), max(high, float(exact.high))
        method += f", widened to contain the exact Clopper-Pearson interval over B's {n_rows} rows"
    return [low, high], method


def _codes(groups, n):
    g = check_groups(groups, n, what="rows")
    return np.arange(n) if g is None else g


def _unpaired_one(a, b, values_a, values_b, groups_a, groups_b, seed, test_fraction, resamples):
    labels_a = _labels(values_a, a.shape[0])
    if isinstance(labels_a, dict):
        return labels_a
    kind, idx_a, y_a = labels_a
    values_b = np.asarray(values_b)
    mask_b = _labelled(values_b, kind) if _kind(values_b) == kind else np.zeros(values_b.shape[0], bool)
    idx_b = np.flatnonzero(mask_b)
    if idx_b.size < MIN_LABELLED_PAIRS:
        return {"not_computable": f"only {idx_b.size} rows of domain B carry this label as a {kind} target; "
                                  f"need {MIN_LABELLED_PAIRS}"}
    y_b = values_b[idx_b].astype(np.float64) if kind == "regression" else values_b[idx_b].astype(str)
    if kind == "regression" and np.ptp(y_b) == 0:
        return {"not_computable": "the label has one value over domain B's rows, so R^2 on B is undefined"}
    if kind == "regression":  # the same scaling as A's (see _labels)
        y_b = y_b / max(float(np.max(np.abs(values_a[idx_a].astype(np.float64)))), np.finfo(float).tiny)
    ga = groups_a[idx_a]
    if np.unique(ga).size < 2:
        return {"not_computable": "the labelled rows of domain A come from one group; a grouped split needs 2"}
    train, test, note = _group_split(np.arange(idx_a.size), ga, seed, test_fraction, y_a)
    if np.unique(y_a[train]).size < 2 or np.unique(y_a[test]).size < 2:
        return {"not_computable": "the label does not vary on both sides of domain A's split; add labelled episodes"}
    model = make_probe(kind).fit(a[idx_a[train]], y_a[train])
    base = _constant_prediction(y_a[train], kind)
    parts = {
        "a": (y_a[test], {"model": model.predict(a[idx_a[test]]), "baseline": np.full(test.size, base)},
              np.unique(ga[test], return_inverse=True)[1]),
        "b": (y_b, {"model": model.predict(b[idx_b])}, np.unique(groups_b[idx_b], return_inverse=True)[1]),
    }
    point = {"clean": _score(kind, y_a[test], parts["a"][1]["model"]),
             "cluttered": _score(kind, y_b, parts["b"][1]["model"]),
             "baseline": _score(kind, y_a[test], parts["a"][1]["baseline"])}
    gaps, margins, b_scores = _unpaired_resamples(kind, parts, seed, resamples)
    m = max(2, min(int(parts["a"][2].max()) + 1, int(parts["b"][2].max()) + 1))
    cluttered_ci, cluttered_ci_method = _b_score_interval(kind, b_scores, point["cluttered"],
                                                          int(parts["b"][2].max()) + 1, int(idx_b.size))
    symmetric = kind == "regression"
    gap_ci = _interval(gaps, point["clean"] - point["cluttered"], m, symmetric)
    decodable = bool(_interval(margins, point["clean"] - point["baseline"], m, symmetric)[0] > 0)
    out = {"kind": kind, "metric": "accuracy" if kind == "classification" else "r2",
           "clean": point["clean"], "cluttered": point["cluttered"], "gap": point["clean"] - point["cluttered"],
           "gap_ci": list(gap_ci), "ci_method": "cluster bootstrap, held-out groups of A and groups of B resampled "
           f"independently, expanded percentile, {resamples} resamples, 95%",
           "baseline": point["baseline"], "decodable": decodable, "n_train": int(train.size),
           "n_test": int(test.size), "n_test_b": int(idx_b.size), "trained_on": "A",
           "cluttered_ci": cluttered_ci, "cluttered_ci_method": cluttered_ci_method}
    out["note"] = note if decodable else f"{note}; {NOT_DECODABLE}"
    return out


def unpaired_probes(a, b, tasks_a, tasks_b, *, groups_a=None, groups_b=None, seed=0, test_fraction=0.3,
                    resamples=BOOTSTRAP_RESAMPLES):
    """Linear probes trained on domain A, scored on held-out A and on all of domain B.

    For unpaired domains (no scene in common) the probe of :func:`linear_probes` cannot
    score the same scenes twice; instead it is fitted on a grouped training split of A
    and scored on A's held-out groups (``clean``, the in-domain score) and on every
    labelled row of B (``cluttered``, the transfer score; B is never trained on). The
    gap is their difference (Alain & Bengio 2016 for probing; the A-to-B transfer reading
    is common practice in domain adaptation, e.g. Ganin et al., JMLR 2016).

    Parameters
    ----------
    a, b : ndarray of shape (n_a, d), (n_b, d)
    tasks_a, tasks_b : dict of str to ndarray
        Labels per row of each domain; only labels present in both are probed.
    groups_a, groups_b : array-like, optional
        Group (episode) per row; default every row its own group.
    seed, test_fraction, resamples
        As :func:`linear_probes`.

    Returns
    -------
    dict of str to dict
        Per shared label the keys of :func:`linear_probes` (``clean`` = held-out A,
        ``cluttered`` = B; ``n_test`` counts A's held-out rows) plus ``n_test_b`` (B's
        labelled rows, all scored), ``trained_on`` ("A"), ``cluttered_ci`` (95% interval
        of B's score: a cluster bootstrap over B's groups, for accuracy widened to contain
        the exact Clopper-Pearson interval over B's ``n_test_b`` rows; Clopper & Pearson,
        Biometrika 26, 1934) and ``cluttered_ci_method``; or not computable.
    """
    for name, tasks in (("tasks_a", tasks_a), ("tasks_b", tasks_b)):
        if not isinstance(tasks, dict):
            raise InvarianceError(f"{name} must be a dict of label name to array; got {type(tasks).__name__}")
    _check_int("seed", seed, 0)
    _check_int("resamples", resamples, 100)
    a, b = _validate_samples(a, b)
    ga, gb = _codes(groups_a, a.shape[0]), _codes(groups_b, b.shape[0])
    return {
        str(name): _unpaired_one(a, b, np.asarray(tasks_a[name]), np.asarray(tasks_b[name]), ga, gb, seed,
                                 float(test_fraction), resamples)
        for name in tasks_a if name in tasks_b
    }
