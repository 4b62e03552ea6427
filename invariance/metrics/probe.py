"""Linear probes: does the task information in the features survive clutter?

A probe is fitted on clean features of training pairs and scored on the held-out pairs,
once on their clean and once on their cluttered features; the gap is the difference.
"""

from __future__ import annotations

import numpy as np
from sklearn.linear_model import LogisticRegression, RidgeCV
from sklearn.metrics import accuracy_score, r2_score
from sklearn.model_selection import train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from invariance.errors import InvarianceError
from invariance.metrics.domain import _check_int, _validate_pairs

# Labelled pairs below which a held-out score says little (common practice).
MIN_LABELLED_PAIRS = 10

# Ridge strengths searched by efficient leave-one-out, half a decade apart from 1e-3 to
# 1e5: the weak end for informative labels on standardised features, the strong end so a
# label the features do not predict gets a near-constant model instead of an over-fitted
# one (common practice). The one grid for every linear probe and task head.
RIDGE_ALPHAS = tuple(np.logspace(-3, 5, 17))

# scikit-learn's default inverse regularisation for the logistic probe (common practice).
PROBE_C = 1.0

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


def _probe_one(clean, cluttered, values, seed, test_fraction):
    values = np.asarray(values)
    if values.ndim != 1 or values.shape[0] != clean.shape[0]:
        raise InvarianceError(
            f"a task label array has shape {values.shape}; it needs one value per pair "
            f"({clean.shape[0]}): give labels in the same order as the features"
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
    pos_train, pos_test, note = _split(np.arange(idx.size), y, kind, seed, test_fraction)
    if np.unique(y[pos_train]).size < 2 or np.unique(y[pos_test]).size < 2:
        return {
            "not_computable": "classes too rare to split into training and held-out pairs "
            "that both vary; add labelled pairs"
        }
    train, test = idx[pos_train], idx[pos_test]
    model = make_probe(kind)
    score, metric = (accuracy_score, "accuracy") if kind == "classification" else (r2_score, "r2")
    model.fit(clean[train], y[pos_train])
    on_clean = float(score(y[pos_test], model.predict(clean[test])))
    on_cluttered = float(score(y[pos_test], model.predict(cluttered[test])))
    out = {
        "kind": kind,
        "metric": metric,
        "clean": on_clean,
        "cluttered": on_cluttered,
        "gap": on_clean - on_cluttered,
        "n_train": int(train.size),
        "n_test": int(test.size),
    }
    if note:
        out["note"] = note
    return out


def linear_probes(clean, cluttered, tasks, *, seed=0, test_fraction=0.3):
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
        Seed of the train/test split.
    test_fraction : float, default=0.3
        Fraction of labelled pairs held out, in (0, 1).

    Returns
    -------
    dict of str to dict
        Per task: ``kind``, ``metric`` ("accuracy" or "r2"), ``clean``, ``cluttered``,
        ``gap`` (clean - cluttered), ``n_train``, ``n_test``; or
        ``{"not_computable": reason}`` when the label cannot be probed.
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
    clean, cluttered = _validate_pairs(clean, cluttered)
    return {
        str(name): _probe_one(clean, cluttered, values, seed, test_fraction)
        for name, values in tasks.items()
    }
