"""Task heads: one held linear head per label column, the probe of the original features.

Where labels exist, a task loss on clean images keeps what a downstream policy relies
on. Each head starts as the project's linear probe fitted on the original clean features
(:func:`invariance.metrics.probe.make_probe`), so the task loss starts at its optimum and
only grows if alignment moves the features away from what the labels need. The heads are
held: the task loss moves the features, never the heads.
"""

from __future__ import annotations

import numpy as np
import torch
from torch import nn
from torch.nn import functional as F

from ..errors import InvarianceError
from ..metrics.probe import make_probe

# Class index that cross-entropy ignores: a class absent from the training pairs.
_IGNORED_CLASS = -100


def _standardiser(f0_train: np.ndarray) -> tuple[np.ndarray, float]:
    """Per-feature mean and one global spread for the task heads' input.

    One spread for all features (not one per feature, as StandardScaler would) keeps a
    nearly constant feature from being amplified into a huge head weight when alignment
    later moves it (common practice for linear heads fitted once and held).
    """
    mean = f0_train.mean(axis=0)
    spread = float(np.sqrt(((f0_train - mean) ** 2).mean())) or 1.0
    return mean, spread


def _check_labels(pairs) -> dict:
    """The task columns of ``pairs``' labels, after checking one row per pair."""
    if pairs.labels is None or not pairs.labels.tasks:
        return {}
    for name, values in pairs.labels.tasks.items():
        if len(values) != len(pairs):
            raise InvarianceError(
                f"labels.csv: column {name!r} has {len(values)} rows for {len(pairs)} pairs; "
                "give one label row per pair"
            )
    return pairs.labels.tasks


def _classification_task(name, values, train_pos, z_train):
    classes = np.unique(values[train_pos])
    if len(classes) < 2:
        return None
    lookup = {c: i for i, c in enumerate(classes)}
    target = torch.tensor([lookup.get(v, _IGNORED_CLASS) for v in values], dtype=torch.long)
    model = make_probe("classification", standardise=False).fit(z_train, values[train_pos])
    coef, bias = model.coef_, model.intercept_
    if len(classes) == 2:  # scikit-learn's single binary row becomes the logits (0, z)
        coef, bias = np.vstack([np.zeros_like(coef), coef]), np.concatenate([[0.0], bias])
    return {"name": name, "kind": "classification", "target": target, "mask": target >= 0, "init": (coef, bias)}


def _regression_task(name, values, train_pos, z_train):
    values = np.asarray(values, dtype=np.float64)
    finite = np.isfinite(values)
    train_ok = train_pos[finite[train_pos]]
    if len(train_ok) < 2 or np.std(values[train_ok]) == 0:
        return None
    # Standardised targets, so each regression weighs like a classification loss.
    mean, std = values[train_ok].mean(), values[train_ok].std()
    target = torch.tensor(np.where(finite, (values - mean) / std, 0.0), dtype=torch.float32)
    model = _smooth_ridge(z_train[finite[train_pos]], target.numpy()[train_ok])
    coef, bias = np.atleast_2d(model.coef_), np.atleast_1d(model.intercept_)
    return {"name": name, "kind": "regression", "target": target, "mask": torch.from_numpy(finite),
            "init": (coef, bias)}


def _smooth_ridge(z: np.ndarray, y: np.ndarray):
    """The most penalised ridge whose leave-one-out error is within one standard error of the best.

    The probe's own penalty (the leave-one-out minimum over ``RIDGE_ALPHAS``) can put large
    weights on features that barely vary on clean images: on the panel's plain Sequential
    CNN the ``y`` head (slice R^2 0.19) had weights up to 28, and features moving by 0.4
    of their spread in one training step took its loss from 0.6 to 1,584. The
    one-standard-error rule (Hastie, Tibshirani & Friedman, The Elements of Statistical
    Learning, 2nd ed. 2009, section 7.10) picks the simplest model the data cannot tell
    from the best: the largest penalty whose mean leave-one-out squared error is within one
    standard error of the minimum.

    Parameters
    ----------
    z : ndarray of shape (n, d)
        Standardised features.
    y : ndarray of shape (n,)
        Standardised target.

    Returns
    -------
    sklearn.linear_model.Ridge
        Fitted.
    """
    from sklearn.linear_model import Ridge, RidgeCV

    from ..metrics.probe import RIDGE_ALPHAS

    search = RidgeCV(alphas=RIDGE_ALPHAS, store_cv_results=True).fit(z, y)
    errors = search.cv_results_.reshape(len(y), len(RIDGE_ALPHAS))  # leave-one-out squared errors
    means = errors.mean(axis=0)
    best = int(np.argmin(means))
    limit = means[best] + errors[:, best].std(ddof=1) / np.sqrt(len(y))
    alpha = max(a for a, m in zip(RIDGE_ALPHAS, means) if m <= limit)
    return Ridge(alpha=alpha).fit(z, y)


def _linear_head(coef: np.ndarray, bias: np.ndarray) -> nn.Linear:
    """The probe's weights as a held ``nn.Linear``: read by the task loss, never trained.

    A trained head moved by Adam's first, full-size steps (about the learning rate per
    weight, whatever the gradient) changes its output by the sum of those steps times the
    features: on the panel's plain Sequential CNN, whose standardised features reach
    several units, the task loss rose from 1.9 to 298 in 20 steps while the features had
    barely moved (anchor 0.005). Held heads keep the task term a measure of the features
    alone; the held-out figures did not change beyond one or two probe errors
    (docs/alignment.md).
    """
    # skip_init: the weights are overwritten at once, so drawing a random init from the
    # caller's global generator would only disturb the caller.
    head = torch.nn.utils.skip_init(nn.Linear, coef.shape[1], coef.shape[0])
    with torch.no_grad():
        head.weight.copy_(torch.as_tensor(coef, dtype=torch.float32))
        head.bias.copy_(torch.as_tensor(bias, dtype=torch.float32))
    return head.requires_grad_(False)


def _build_tasks(tasks: dict, kinds: dict, train_pos: np.ndarray, z_train: np.ndarray) -> list[dict]:
    """Held task heads: the probes of the original features, so their loss starts at its optimum.

    Parameters
    ----------
    tasks : dict of str to ndarray
        Labels per alignment pair.
    kinds : dict of str to str
        ``"classification"`` or ``"regression"`` per task (classification when missing).
    train_pos : ndarray of int
        Positions of the training pairs among the alignment pairs.
    z_train : ndarray
        The training pairs' original clean features after :func:`_standardiser`.

    Returns
    -------
    list of dict
        Per usable task: ``name``, ``kind``, ``target`` and ``mask`` (per alignment pair)
        and ``head`` (a held ``nn.Linear``). Tasks with one class or a constant value are left out.
    """
    built = []
    for name, values in tasks.items():
        maker = _regression_task if kinds.get(name) == "regression" else _classification_task
        task = maker(name, np.asarray(values), train_pos, z_train)
        if task is not None:
            task["head"] = _linear_head(*task.pop("init"))
            built.append(task)
    return built


def _task_loss(tasks: list[dict], features: torch.Tensor, positions: torch.Tensor) -> torch.Tensor:
    """Cross-entropy (classes) or squared error (standardised numbers), summed over tasks.

    The heads are held (see :func:`_linear_head`): the loss moves the features, never the
    heads.
    """
    total = features.new_zeros(())
    for task in tasks:
        mask = task["mask"][positions]
        if not bool(mask.any()):
            continue
        out = task["head"](features[mask])
        target = task["target"][positions][mask]
        if task["kind"] == "classification":
            total = total + F.cross_entropy(out, target)
        else:
            total = total + F.mse_loss(out.squeeze(1), target)
    return total
