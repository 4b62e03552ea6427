"""What the validation slice says during training: separability, drift, clean probes, the guard.

Every few steps the validation slice of the alignment pairs is checked with the project's
own metrics: the domain classifier's grouped 3-fold accuracy (not the adversary's own
accuracy, which only says how well the adversary is doing), the relative paired drift, and
a clean probe per label (fitted on the training pairs' clean features, scored on the
slice's). The guard stops training when a clean probe falls too far below its start.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.stats import t as student_t

from ..metrics.domain import domain_classifier
from ..metrics.drift import paired_drift
from ..metrics.probe import make_probe
from .splits import VALIDATION_FOLDS

# Bootstrap resamples of the drift's interval, which the slice check does not use; the
# smallest paired_drift accepts keeps it cheap.
_DRIFT_RESAMPLES = 100
# Only the fixed C = 1 (scikit-learn's default): an inner search over C on a slice of a
# few dozen pairs would cost more than the training step it checks (common practice).
_SLICE_CS = (1.0,)
_SLICE_PERMUTATIONS = 0
# Two-sided 95% normal quantile for the noise allowance of an accuracy (common practice).
_Z_95 = 1.96
# Level of the test that a regression probe predicts anything at the start (common practice).
_ALPHA = 0.05


def _domain_accuracy(clean: np.ndarray, cluttered: np.ndarray, seed: int) -> float:
    # Only the accuracy is read, not the permutation test's p-value: no permutation test keeps
    # the check cheap (the accuracy does not depend on the number of permutations).
    return float(domain_classifier(clean, cluttered, folds=VALIDATION_FOLDS, seed=seed, Cs=_SLICE_CS,
                                   permutations=_SLICE_PERMUTATIONS)["accuracy"])


def _relative_drift(clean: np.ndarray, cluttered: np.ndarray) -> float:
    drift = paired_drift(clean, cluttered, resamples=_DRIFT_RESAMPLES)
    return float(drift.get("relative_drift", math.inf))


def _probe_scores(tasks, f_train, f_val, train_pos, val_pos) -> dict:
    """Clean probe per task: fitted on training pairs, accuracy or R^2 on the validation slice."""
    scores = {}
    for task in tasks:
        mask, target = task["mask"].cpu().numpy(), task["target"].cpu().numpy()
        tr, va = mask[train_pos], mask[val_pos]
        if not va.any():
            continue
        model = make_probe(task["kind"]).fit(f_train[tr], target[train_pos][tr])
        scores[task["name"]] = float(model.score(f_val[va], target[val_pos][va]))
    return scores


def check_slice(f_clean: np.ndarray, f_cluttered_val: np.ndarray, tasks: list[dict], train_pos: np.ndarray,
                val_pos: np.ndarray, seed: int) -> dict:
    """Domain accuracy, relative drift and clean probes on the validation slice.

    Parameters
    ----------
    f_clean : ndarray of shape (n_align, d)
        Current clean features of every alignment pair.
    f_cluttered_val : ndarray of shape (n_val, d)
        Current cluttered features of the slice.
    tasks : list of dict
        The task heads' targets and masks (see :mod:`invariance.align.heads`).
    train_pos, val_pos : ndarray of int
        Positions of the training pairs and of the slice among the alignment pairs.
    seed : int
        Seed of the domain classifier's folds.

    Returns
    -------
    dict
        ``domain_accuracy``, ``drift`` (inf when not computable) and ``probes`` (per task).
    """
    clean_val = f_clean[val_pos]
    return {
        "domain_accuracy": _domain_accuracy(clean_val, f_cluttered_val, seed),
        "drift": _relative_drift(clean_val, f_cluttered_val),
        "probes": _probe_scores(tasks, f_clean[train_pos], clean_val, train_pos, val_pos),
    }


def carried(tasks: list[dict], f_clean: np.ndarray, train_pos: np.ndarray, val_pos: np.ndarray) -> dict:
    """Which tasks the original encoder carries, judged on the validation slice.

    A classification task is carried when its clean probe's accuracy on the slice beats
    the majority-class rate of the training pairs in a one-sided exact binomial test at
    the 5% level; a regression task when its R^2 exceeds the critical r^2 of a two-sided
    5% test of a correlation (:func:`_informative_r2`). Both are common practice. Only
    carried tasks get a task head and a guard: a task the encoder never carried cannot
    be kept, and its probe's noise must not stop a run.

    Parameters
    ----------
    tasks : list of dict
        Targets and masks per alignment pair (see :mod:`invariance.align.heads`).
    f_clean : ndarray of shape (n_align, d)
        The original encoder's clean features of the alignment pairs.
    train_pos, val_pos : ndarray of int

    Returns
    -------
    dict of str to dict
        Per task: ``score`` (accuracy or R^2 on the slice), ``floor`` (the score it had
        to beat) and ``carried`` (bool).
    """
    from scipy.stats import binomtest

    scores = _probe_scores(tasks, f_clean[train_pos], f_clean[val_pos], train_pos, val_pos)
    verdicts = {}
    for task in tasks:
        name = task["name"]
        if name not in scores:
            continue
        mask = task["mask"].cpu().numpy()
        n_val = int(mask[val_pos].sum())
        if task["kind"] == "classification":
            labels = task["target"].cpu().numpy()[train_pos][mask[train_pos]]
            majority = float(np.bincount(labels).max() / len(labels))
            k = int(round(scores[name] * n_val))
            ok = k > majority * n_val and binomtest(k, n_val, majority, alternative="greater").pvalue < _ALPHA
            verdicts[name] = {"score": scores[name], "floor": majority, "carried": bool(ok)}
        else:
            floor = _informative_r2(n_val) if n_val > 2 else math.inf
            verdicts[name] = {"score": scores[name], "floor": floor, "carried": bool(scores[name] > floor)}
    return verdicts


def _informative_r2(n_val: int) -> float:
    """Smallest validation R^2 that shows the probe predicts its label at all.

    An out-of-sample R^2 never exceeds the squared correlation of predictions and targets
    (rescaling the predictions can only lower the error), so an R^2 above the critical r^2
    of the two-sided 5% t test of a correlation on ``n_val`` pairs means the predictions
    correlate with the label beyond chance: r^2 = t^2 / (t^2 + n - 2) (common practice).
    """
    t = float(student_t.ppf(1.0 - _ALPHA / 2.0, n_val - 2))
    return t * t / (t * t + n_val - 2)


def _r2_noise(start: float, n: int) -> float:
    """1.96 standard errors of a difference of two R^2 values on ``n`` images each.

    The large-sample variance of a sample R^2 is ``4 rho^2 (1 - rho^2)^2 / n`` (Olkin &
    Finn, Psychological Bulletin 118 (1995) 155-164, from memory); the difference of two
    independent estimates has twice that variance. ``rho^2`` is taken as ``start``
    clipped to [0, 1].
    """
    r2 = min(max(start, 0.0), 1.0)
    return _Z_95 * math.sqrt(2.0 * 4.0 * r2 * (1.0 - r2) ** 2 / max(n, 1))


def _allowed_fall(start: float, kind: str, margin: float, n_val: int, r2_noise: float | None = None) -> float:
    """How far a clean probe may fall below ``start`` before it counts as fallen.

    ``margin`` (relative), or the sampling noise of the score on ``n_val`` images,
    whichever is larger: a fall the images cannot tell from noise does not stop a run
    nor fail the held-out judgement. ``r2_noise``, when given, replaces the
    normal-theory noise of an R^2 (a bootstrap's, which holds for heavy-tailed errors).
    """
    fall = margin * abs(start)
    if kind == "classification":
        # 1.96 standard errors of a difference of two accuracies on n_val images
        # (two-proportion z, common practice).
        return max(fall, _Z_95 * math.sqrt(2.0 * start * (1.0 - start) / n_val))
    # R^2 = 1 - MSE / variance, so the error rising by ``margin`` (relative) lowers R^2 by
    # margin * (1 - R^2). Either reading of "margin" may apply: for a weak probe a fall of
    # margin times the score itself would stop training over the third decimal. A probe
    # that explains little of its label on a few dozen images is noisy far beyond either:
    # its sampling noise applies as for an accuracy (a task carried only just above the
    # floor stopped every run on the panel's Sequential CNN, docs/alignment.md).
    noise = _r2_noise(start, n_val) if r2_noise is None else r2_noise
    return max(fall, margin * (1.0 - start), noise)


def _guard_failure(start: dict, now: dict, margin: float, kinds: dict, n_val: int) -> str | None:
    """Why training must stop, or None: a clean probe fell more than allowed below its start.

    A regression probe whose starting R^2 is within sampling noise of zero carries no
    information worth guarding (see :func:`_informative_r2`).

    Parameters
    ----------
    start, now : dict of str to float
        Probe scores at step 0 and now.
    margin : float
        Relative fall allowed.
    kinds : dict of str to str
        ``"classification"`` or ``"regression"`` per probe.
    n_val : int
        Pairs in the validation slice.

    Returns
    -------
    str or None
    """
    for name, s0 in start.items():
        if name not in kinds or (kinds[name] == "regression" and s0 < _informative_r2(n_val)):
            continue
        if name in now and s0 - now[name] > _allowed_fall(s0, kinds[name], margin, n_val):
            return (
                f"guard: clean probe {name!r} fell from {s0:.3f} to {now[name]:.3f} on the validation "
                f"slice (more than {margin:.0%} below its start and beyond sampling noise)"
            )
    return None
