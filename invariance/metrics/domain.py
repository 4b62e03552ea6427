"""Domain classifier: can a linear model tell clean from cluttered features?

Held-out accuracy of a regularised logistic regression, with grouped folds over pairs,
an exact binomial interval, the proxy A-distance (Ben-David et al., NIPS 2006) and the
classifier two-sample p-value (Lopez-Paz & Oquab, ICLR 2017, section 3).
"""

from __future__ import annotations

import inspect

import numpy as np
from scipy.stats import binomtest
from sklearn.base import clone
from sklearn.linear_model import LogisticRegression, LogisticRegressionCV
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from threadpoolctl import threadpool_limits

from invariance.errors import InvarianceError
from invariance.readings import small_sample_note

# A small log-spaced grid of inverse regularisation strengths on standardised features.
# Ganin et al. (JMLR 2016, section 3.2) pick the linear classifier's C over a range and
# keep the best held-out error; four decades cover strong regularisation (needed when
# d >> n) to mild, and keep the inner search cheap (common practice).
DEFAULT_CS = (1e-3, 1e-2, 1e-1, 1.0)

# Inner folds for choosing C inside each outer training fold (common practice).
INNER_FOLDS = 3

# Held-out pairs per outer fold below which the fold accuracy is too coarse to be useful
# (a fold needs both domains of at least two scenes; common practice).
MIN_PAIRS_PER_FOLD = 2

# Rabanser, Guennemann & Lipton, NeurIPS 2019, section 3.2: domain classifiers do poorly
# with 100 samples or fewer.
SMALL_SAMPLE_PAIRS = 100

# Pairs used at most; above this a seeded subsample bounds the time of the 5 x (3 + 1)
# fits (the 95% interval is then about +-1.4 points wide, enough to read).
MAX_PAIRS = 5000

# lbfgs iterations are matrix-vector products, which gain little from several BLAS
# threads and lose much when the cores are shared: a 3,200 x 512 fit ran 3-6x faster on
# one thread than on two on a busy 2-core machine (tests/benchmarks/bench_stats.py
# shows the effect), so the fits run single-threaded.
_FIT_THREADS = 1

# Logistic regression iterations; the problems are small and well conditioned after
# standardisation, lbfgs converges in tens of iterations (common practice).
_MAX_ITER = 2000


# scikit-learn 1.9 announces new LogisticRegressionCV defaults; opt into them where they
# exist (pure L2, simplified fitted attributes) so older and newer versions agree.
_LRCV_KWARGS = (
    {"l1_ratios": (0.0,), "use_legacy_attributes": False}
    if "use_legacy_attributes" in inspect.signature(LogisticRegressionCV).parameters
    else {}
)


def _check_int(name, value, low):
    """Return ``value`` as int if it is an integer >= ``low``, else a clear error."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise InvarianceError(f"{name} must be an integer >= {low}; got {value!r}")
    return int(value)


# Largest feature magnitude accepted: the statistics sum squares of up to ~1e8 entries, and
# (1e100)^2 * 1e8 = 1e208 stays far below float64's 1.8e308.
MAX_ABS_FEATURE = 1e100
# float32 overflows at 3.4e38: squares of values above 1e15 summed over 1e8 entries would,
# so such arrays are computed in float64.
_FLOAT32_SAFE_ABS = 1e15


def _checked_magnitude(name, arr):
    peak = float(np.max(np.abs(arr))) if arr.size else 0.0
    if peak > MAX_ABS_FEATURE:
        raise InvarianceError(
            f"{name} features reach {peak:.3g}, too large to square without overflow (limit "
            f"{MAX_ABS_FEATURE:.0e}): divide both feature matrices by one constant first"
        )
    if arr.dtype != np.float64 and peak > _FLOAT32_SAFE_ABS:
        arr = arr.astype(np.float64)
    return arr


def _validate_pairs(clean, cluttered, *, min_pairs=1):
    """Return ``clean`` and ``cluttered`` as 2-D float arrays of equal shape."""
    clean = np.asarray(clean)
    cluttered = np.asarray(cluttered)
    if clean.ndim != 2 or cluttered.ndim != 2:
        raise InvarianceError(
            f"clean and cluttered features must be 2-D (n_pairs, d); got shapes "
            f"{clean.shape} and {cluttered.shape}: reshape to one row per image"
        )
    if clean.shape != cluttered.shape:
        raise InvarianceError(
            f"clean features have shape {clean.shape} but cluttered features have shape "
            f"{cluttered.shape}: give one row per pair, in the same order, same layer"
        )
    if not np.issubdtype(clean.dtype, np.floating):
        clean = clean.astype(np.float64)
    if not np.issubdtype(cluttered.dtype, np.floating):
        cluttered = cluttered.astype(np.float64)
    if clean.shape[1] == 0:
        raise InvarianceError(
            f"the features have 0 columns (shape {clean.shape}): give at least one feature per "
            f"image (check the layer or the arrays you saved)"
        )
    for name, arr in (("clean", clean), ("cluttered", cluttered)):
        bad = ~np.isfinite(arr).all(axis=1)
        if bad.any():
            rows = ", ".join(map(str, np.flatnonzero(bad)[:5])) + (", ..." if bad.sum() > 5 else "")
            raise InvarianceError(
                f"{name} features contain NaN or inf in {int(bad.sum())} of "
                f"{arr.shape[0]} rows (rows {rows}): remove those pairs or fix the feature extraction"
            )
    clean = _checked_magnitude("clean", clean)
    cluttered = _checked_magnitude("cluttered", cluttered)
    if clean.dtype != cluttered.dtype:
        clean, cluttered = clean.astype(np.float64), cluttered.astype(np.float64)
    if clean.shape[0] < min_pairs:
        raise InvarianceError(
            f"only {clean.shape[0]} pairs of features; need at least {min_pairs}: "
            f"add more pairs"
        )
    return clean, cluttered


class _StackedPairKFold:
    """K folds over pairs for a training set stacked as [clean rows; cluttered rows].

    Row ``i`` and row ``i + m`` of a training set of ``2 m`` rows are one scene, so the
    folds keep them together without needing a ``groups`` argument. This lets the inner
    search run inside an estimator that :func:`sklearn.model_selection.cross_val_score`
    can clone and fit.
    """

    def __init__(self, n_splits=INNER_FOLDS, seed=0):
        self.n_splits = n_splits
        self.seed = seed

    def get_n_splits(self, X=None, y=None, groups=None):
        return self.n_splits

    def split(self, X, y=None, groups=None):
        m = len(X) // 2
        for train, test in paired_folds(m, self.n_splits, seed=self.seed):
            yield train, test


def paired_folds(n_pairs, folds, *, seed=0):
    """Grouped K-fold splits over pairs for rows stacked as [clean; cluttered].

    Pair indices are shuffled by a seeded permutation and cut into ``folds`` contiguous
    groups of near-equal size; a held-out fold holds both images of its scenes.

    Parameters
    ----------
    n_pairs : int
        Number of pairs; rows ``i`` and ``n_pairs + i`` of the stacked matrix are pair i.
    folds : int
        Number of folds, at least 2.
    seed : int
        Seed of the permutation of pair indices.

    Returns
    -------
    list of (train, test) tuples of int arrays
        Row indices into the stacked ``2 * n_pairs`` matrix. Training rows are ordered
        [clean of the training pairs; cluttered of the same pairs, same order].
    """
    order = np.random.default_rng(seed).permutation(n_pairs)
    splits = []
    for held in np.array_split(np.arange(n_pairs), folds):
        test_pairs = np.sort(order[held])
        train_pairs = np.sort(np.setdiff1d(order, test_pairs))
        train = np.concatenate([train_pairs, train_pairs + n_pairs])
        test = np.concatenate([test_pairs, test_pairs + n_pairs])
        splits.append((train, test))
    return splits


def make_domain_estimator(Cs=DEFAULT_CS, *, seed=0):
    """The domain classifier as an unfitted scikit-learn estimator.

    StandardScaler followed by L2 logistic regression; with more than one value in
    ``Cs`` the inverse regularisation strength is chosen by
    :class:`~sklearn.linear_model.LogisticRegressionCV` with an inner grouped 3-fold
    search on the training rows (which must be stacked as [clean; cluttered]); ties
    go to the strongest regularisation.

    Parameters
    ----------
    Cs : sequence of float
        Candidate inverse regularisation strengths, all > 0.
    seed : int
        Seed of the inner folds.

    Returns
    -------
    estimator
        A scikit-learn Pipeline.
    """
    if len(Cs) == 1:
        return make_pipeline(StandardScaler(), LogisticRegression(C=Cs[0], max_iter=_MAX_ITER))
    search = LogisticRegressionCV(
        Cs=sorted(Cs),
        cv=_StackedPairKFold(INNER_FOLDS, seed=seed),
        scoring="accuracy",
        max_iter=_MAX_ITER,
        **_LRCV_KWARGS,
    )
    return make_pipeline(StandardScaler(), search)


def _check_params(folds, seed, Cs):
    _check_int("folds", folds, 2)
    _check_int("seed", seed, 0)
    Cs = tuple(float(c) for c in np.atleast_1d(Cs))
    if not Cs or not all(np.isfinite(c) and c > 0 for c in Cs):
        raise InvarianceError(f"Cs must be one or more finite values > 0; got {Cs!r}")
    return Cs


def _chosen_C(model):
    last = model[-1]
    return float(np.ravel(last.C_)[0]) if isinstance(last, LogisticRegressionCV) else float(last.C)


def domain_classifier(clean, cluttered, *, folds=5, seed=0, Cs=DEFAULT_CS, max_pairs=MAX_PAIRS):
    """Held-out accuracy of a linear classifier telling clean from cluttered features.

    Standardised features, L2 logistic regression, K folds over pairs (a scene's two
    images are always held out together). With several ``Cs`` the regularisation is
    chosen by an inner grouped search inside each training fold, so the held-out
    predictions never see their own labels and the test stays valid when d >> n.

    Parameters
    ----------
    clean, cluttered : ndarray of shape (n_pairs, d)
        Paired features; row i of each is the same scene.
    folds : int, default=5
        Outer folds over pairs. Needs ``n_pairs >= 2 * folds``.
    seed : int, default=0
        Seed of the fold assignment.
    Cs : sequence of float, default=(1e-3, 1e-2, 1e-1, 1)
        Inverse regularisation strengths to choose from; one value fixes C.
    max_pairs : int, default=5000
        Above this many pairs a seeded random subsample of ``max_pairs`` pairs is
        used (reported in ``method``) to bound the time.

    Returns
    -------
    dict
        ``accuracy`` (held-out, over all 2 n_pairs images), ``ci`` (95% exact
        Clopper-Pearson interval, ``scipy.stats.binomtest(...).proportion_ci(method=
        "exact")``), ``proxy_a_distance`` max(0, 2 (1 - 2 err)) (Ben-David et al., NIPS 2006;
        Ganin et al., JMLR 2016, eq. 3), ``p_value`` one-sided binomial test against
        chance (Lopez-Paz & Oquab, ICLR 2017, section 3), ``folds``, ``n_test``,
        ``C`` (chosen per fold), ``ci_method``, ``method`` ("exact" or "subsample of N
        pairs"), ``pairs_used``, ``decision`` (held-out decision value per pair used,
        shape (pairs_used, 2): clean, cluttered; positive means "cluttered"),
        and ``small_sample`` / ``note`` when n_pairs <= 100 (Rabanser et al., NeurIPS
        2019, section 3.2).
    """
    Cs = _check_params(folds, seed, Cs)
    _check_int("max_pairs", max_pairs, MIN_PAIRS_PER_FOLD * folds)
    clean, cluttered = _validate_pairs(clean, cluttered)
    n = clean.shape[0]
    method = "exact"
    if n > max_pairs:
        # a stream separate from the fold permutation's, so both stay seeded
        keep = np.sort(np.random.default_rng([seed, 1]).choice(n, max_pairs, replace=False))
        clean, cluttered, n = clean[keep], cluttered[keep], max_pairs
        method = f"subsample of {n} pairs"
    if n < MIN_PAIRS_PER_FOLD * folds:
        raise InvarianceError(
            f"only {n} pairs for {folds} folds; the domain classifier needs at least "
            f"{MIN_PAIRS_PER_FOLD * folds} pairs ({MIN_PAIRS_PER_FOLD} per fold): add "
            f"pairs or lower folds"
        )
    X = np.vstack([clean, cluttered])
    y = np.r_[np.zeros(n, dtype=int), np.ones(n, dtype=int)]
    estimator = make_domain_estimator(Cs, seed=seed)
    decision = np.empty(2 * n)
    chosen = []
    with threadpool_limits(limits=_FIT_THREADS):
        for train, test in paired_folds(n, folds, seed=seed):
            model = clone(estimator).fit(X[train], y[train])
            decision[test] = model.decision_function(X[test])
            chosen.append(_chosen_C(model))
    out = _summarise(decision, y, folds, chosen)
    out["method"], out["pairs_used"] = method, n
    return out


def _summarise(decision, y, folds, chosen):
    n_test = len(y)
    # predict() of LogisticRegression labels 1 where the decision value is > 0
    correct = int(((decision > 0).astype(int) == y).sum())
    test = binomtest(correct, n_test, 0.5, alternative="greater")
    ci = binomtest(correct, n_test, 0.5).proportion_ci(0.95, method="exact")
    accuracy = correct / n_test
    out = {
        "accuracy": accuracy,
        "ci": [float(ci.low), float(ci.high)],
        "ci_method": "exact Clopper-Pearson, 95%",
        # d_A takes the best hypothesis of a class closed under complement, so its error
        # is at most 1/2 (Ben-David et al., NIPS 2006): below-chance accuracy floors at 0
        "proxy_a_distance": max(0.0, 2.0 * (1.0 - 2.0 * (1.0 - accuracy))),
        "p_value": float(test.pvalue),
        "folds": int(folds),
        "n_test": int(n_test),
        "C": chosen,
        "decision": decision.reshape(2, -1).T.copy(),
    }
    if n_test // 2 <= SMALL_SAMPLE_PAIRS:
        out["small_sample"] = True
        out["note"] = small_sample_note(n_test // 2)
    return out
