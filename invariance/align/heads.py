"""Task heads: one linear head per label column, warm-started on the original features.

Where labels exist, a task loss on clean images keeps what a downstream policy relies
on. Each head starts as the project's linear probe fitted on the original clean features
(:func:`invariance.metrics.probe.make_probe`), so the task loss starts at its optimum and
only grows if alignment moves the features away from what the labels need.
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
    later moves it (common practice for warm-started linear heads).
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
    # The probe's ridge penalty is chosen by leave-one-out: a label the features do not
    # predict gets a near-constant head, not an over-fitted one whose loss explodes once
    # the features move.
    model = make_probe("regression", standardise=False).fit(z_train[finite[train_pos]], target.numpy()[train_ok])
    coef, bias = np.atleast_2d(model.coef_), np.atleast_1d(model.intercept_)
    return {"name": name, "kind": "regression", "target": target, "mask": torch.from_numpy(finite),
            "init": (coef, bias)}


def _linear_head(coef: np.ndarray, bias: np.ndarray) -> nn.Linear:
    # skip_init: the weights are overwritten at once, so drawing a random init from the
    # caller's global generator would only disturb the caller.
    head = torch.nn.utils.skip_init(nn.Linear, coef.shape[1], coef.shape[0])
    with torch.no_grad():
        head.weight.copy_(torch.as_tensor(coef, dtype=torch.float32))
        head.bias.copy_(torch.as_tensor(bias, dtype=torch.float32))
    return head


def _build_tasks(tasks: dict, kinds: dict, train_pos: np.ndarray, z_train: np.ndarray) -> list[dict]:
    """Task heads warm-started on the original features, so their loss starts at its optimum.

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
        and ``head`` (an ``nn.Linear``). Tasks with one class or a constant value are left out.
    """
    built = []
    for name, values in tasks.items():
        maker = _regression_task if kinds.get(name) == "regression" else _classification_task
        task = maker(name, np.asarray(values), train_pos, z_train)
        if task is not None:
            task["head"] = _linear_head(*task.pop("init"))
            built.append(task)
    return built


def _task_loss(tasks: list[dict], features: torch.Tensor, positions: torch.Tensor,
               hold_heads: bool = False) -> torch.Tensor:
    """Cross-entropy (classes) or squared error (standardised numbers), summed over tasks.

    With ``hold_heads`` the heads' weights are read but not trained by this loss: the
    cluttered view's term of the ``teacher`` objective moves the features towards what the
    clean heads read, not the heads towards cluttered features (a head trained on cluttered
    features far outside the clean ones grew the plain Sequential CNN's task loss 30-fold
    in 20 steps, docs/alignment.md).
    """
    total = features.new_zeros(())
    for task in tasks:
        mask = task["mask"][positions]
        if not bool(mask.any()):
            continue
        head = task["head"]
        if hold_heads:
            out = F.linear(features[mask], head.weight.detach(), head.bias.detach())
        else:
            out = head(features[mask])
        target = task["target"][positions][mask]
        if task["kind"] == "classification":
            total = total + F.cross_entropy(out, target)
        else:
            total = total + F.mse_loss(out.squeeze(1), target)
    return total
