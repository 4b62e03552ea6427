"""The training loop: cached activations in, the best validated tail state out, with curves.

Batch normalisation keeps its running statistics (the tail stays in eval mode): a mixed
clean/cluttered batch of a few dozen would otherwise overwrite the statistics the
checkpoint ships with. The state with the lowest validation drift is kept, because the
slice's domain accuracy moves in coarse, noisy steps and sits near 1 while clutter still
separates the domains, whereas drift falls smoothly as scenes align. The measurements
behind these choices are in ``docs/alignment.md``.

References
----------
Ganin et al. (2016). Domain-adversarial training of neural networks. JMLR 17, 59:1-35,
section 5.2.2 (the schedules).
Kingma, D. P. & Ba, J. (2015). Adam: a method for stochastic optimization. ICLR 2015.
"""

from __future__ import annotations

import math
import time

import numpy as np
import torch
from torch import nn

from .heads import _task_loss
from .losses import (anchor_loss, domain_loss, mean_matching_loss, paired_drift_loss, paired_loss, paired_variance,
                     whitening)
from .monitor import _guard_failure, check_slice
from .reversal import dann_lambda, dann_learning_rate, make_discriminator
from .trunk import tail_features

# The parts of _Run.losses logged as ``loss_<name>`` curves, shown in progress lines and
# saved as the checkpoint's final losses.
LOSS_NAMES = ("total", "domain", "anchor", "task", "paired", "mean")
# Steps between validation checks: the kept state is chosen among 40 checked ones in the
# default 800 steps (common practice).
EVAL_EVERY = 20
# Consecutive failed guard checks that stop training (see _Training.evaluate).
GUARD_PATIENCE = 3
# Share of the steps over which the learning rate rises linearly to its value (see
# learning_rate; one tenth is common practice).
WARMUP_SHARE = 0.1


class _Run:
    """Everything one alignment run trains on: cached activations, frozen targets, models.

    Parameters
    ----------
    tail : nn.Module
        The trained stages.
    act_clean, act_cluttered : torch.Tensor
        Cached trunk activations of every alignment pair's two views.
    train_pos, val_pos : ndarray of int
        Positions of the training pairs and of the validation slice among the alignment pairs.
    tasks : list of dict
        Warm-started task heads (see :mod:`invariance.align.heads`).
    head_input : tuple of (torch.Tensor, float)
        Mean and spread that standardise features for the heads.
    seed : int
        Seeds the discriminator's initial weights, the batch order and the slice checks
        through local generators; the caller's global random state is not touched.
    objective : str, default="combined"
        ``"teacher"`` replaces the paired term by the teacher pull and lets the heads read
        the cluttered view too (see :meth:`losses`); other objectives only set weights.
    """

    def __init__(self, tail, act_clean, act_cluttered, train_pos, val_pos, tasks, head_input, seed,
                 objective="combined"):
        self.tail, self.act_clean, self.act_cluttered = tail, act_clean, act_cluttered
        self.objective = objective
        self.train_pos, self.val_pos, self.tasks = train_pos, val_pos, tasks
        self.head_input, self.seed = head_input, seed
        self.f0_clean = tail_features(tail, act_clean)
        f0_train = self.f0_clean[train_pos]
        self.scale = f0_train.var(dim=0).mean().clamp_min(1e-12)
        self.whitening = whitening(f0_train)
        self.variance = paired_variance(f0_train)
        # The discriminator reads features standardised by the original clean training
        # features, so its gradients do not depend on the encoder's feature scale.
        self.standardise = (f0_train.mean(dim=0), f0_train.std(dim=0).clamp_min(1e-6 * float(self.scale) ** 0.5))
        # The mean term is divided by its value on the original features of the training
        # pairs: it starts at 1 whatever the feature scale, dimension and the strength of
        # the clutter, so its weight means the same on every encoder. The paired term is a
        # relative drift, scale-free by construction (losses.paired_drift_loss).
        f0_clut = tail_features(tail, act_cluttered[train_pos])
        self.norms = {"mean": float(mean_matching_loss(f0_train, f0_clut, self.whitening)) or 1.0}
        device = self.f0_clean.device
        generator = torch.Generator().manual_seed(seed)
        self.discriminator = make_discriminator(self.f0_clean.shape[1], generator).to(device)
        for task in tasks:
            task["head"].to(device)
            task["target"], task["mask"] = task["target"].to(device), task["mask"].to(device)
        self.rng = np.random.default_rng([seed, 2])
        self._queue = np.empty(0, dtype=int)

    def parameters(self) -> list[nn.Parameter]:
        # The task heads are held probes (heads._linear_head): not among the trained parameters.
        params = [p for p in self.tail.parameters() if p.requires_grad]
        return params + list(self.discriminator.parameters())

    def _head_features(self, features: torch.Tensor) -> torch.Tensor:
        """Features in the units the heads were fitted in (heads._standardiser)."""
        return (features - self.head_input[0]) / self.head_input[1]

    def next_batch(self, batch_size: int) -> np.ndarray:
        """Positions (into the alignment arrays) of the next batch: epochs of seeded shuffles."""
        if len(self._queue) < batch_size:
            self._queue = np.concatenate([self._queue, self.rng.permutation(self.train_pos)])
        batch, self._queue = self._queue[:batch_size], self._queue[batch_size:]
        return batch

    def losses(self, batch, lambda_: float, weights: dict) -> dict:
        """Every loss term of ``batch`` and their weighted total (see :func:`align_encoder`)."""
        f_clean = self.tail(self.act_clean[batch])
        f_clut = self.tail(self.act_cluttered[batch])
        parts = {}
        mu, sd = self.standardise
        parts["domain"], parts["discriminator_accuracy"] = domain_loss(
            self.discriminator, (f_clean - mu) / sd, (f_clut - mu) / sd, lambda_)
        parts["anchor"] = anchor_loss(f_clean, self.f0_clean[batch], self.scale)
        positions = torch.as_tensor(batch)
        parts["task"] = _task_loss(self.tasks, self._head_features(f_clean), positions)
        if self.objective == "teacher":
            # The teacher pull: each cluttered view onto the original encoder's clean feature
            # of its pair, per feature in units of its clean spread (losses.paired_loss), and
            # the held heads reading the cluttered view too (a pair's views share its
            # labels). Scale-free: standardised features, standardised targets.
            parts["paired"] = paired_loss(self.f0_clean[batch], f_clut, self.variance)
            parts["task"] = parts["task"] + _task_loss(self.tasks, self._head_features(f_clut), positions)
        else:
            parts["paired"] = paired_drift_loss(f_clean, f_clut)
        parts["mean"] = mean_matching_loss(f_clean, f_clut, self.whitening) / self.norms["mean"]
        # The mean term is an adaptation loss like the domain term, so it follows the same
        # lambda_p ramp: at full weight from step 0 its early gradients, while the means are
        # still far apart, overrode the anchor and tripped the clean probe guard.
        parts["total"] = (weights.get("domain", 1.0) * parts["domain"] + weights["anchor"] * parts["anchor"]
                          + weights["task"] * parts["task"] + weights["paired"] * parts["paired"]
                          + weights["mean"] * lambda_ * parts["mean"])
        return parts

    def validate(self) -> dict:
        """The slice checks of :func:`invariance.align.monitor.check_slice` on the current tail."""
        f_clean = tail_features(self.tail, self.act_clean).cpu().numpy()
        f_clut = tail_features(self.tail, self.act_cluttered[self.val_pos]).cpu().numpy()
        return check_slice(f_clean, f_clut, self.tasks, self.train_pos, self.val_pos, self.seed)


def _empty_curves() -> dict:
    keys = ["step", "discriminator_accuracy", *(f"loss_{k}" for k in LOSS_NAMES), "lambda", "learning_rate",
            "val_domain_accuracy", "val_relative_drift", "val_clean_probe"]
    return {k: [] for k in keys}


def _record(curves: dict, step: int, means: dict, lambda_: float, lr: float, val: dict) -> None:
    curves["step"].append(int(step))
    curves["discriminator_accuracy"].append(round(means["discriminator_accuracy"], 6))
    for key in LOSS_NAMES:
        curves[f"loss_{key}"].append(round(means[key], 6))
    curves["lambda"].append(round(lambda_, 6))
    curves["learning_rate"].append(float(f"{lr:.6g}"))
    curves["val_domain_accuracy"].append(round(val["domain_accuracy"], 6))
    curves["val_relative_drift"].append(round(val["drift"], 6) if math.isfinite(val["drift"]) else None)
    probes = val["probes"]
    curves["val_clean_probe"].append(round(float(np.mean(list(probes.values()))), 6) if probes else None)


def progress_line(curves: dict, steps: int) -> str:
    """The last recorded row of ``curves`` as one line, every logged loss included.

    Parameters
    ----------
    curves : dict of str to list
        The run's curves (see :func:`train`).
    steps : int
        Steps the run was asked for.

    Returns
    -------
    str
    """
    row = {k: v[-1] for k, v in curves.items()}
    probe = "n/a" if row["val_clean_probe"] is None else f"{row['val_clean_probe']:.3f}"
    drift = "n/a" if row["val_relative_drift"] is None else f"{row['val_relative_drift']:.3f}"
    terms = ", ".join(f"{k} {row[f'loss_{k}']:.4f}" for k in LOSS_NAMES if k != "total")
    return (f"align step {row['step']}/{steps}: discriminator acc {row['discriminator_accuracy']:.3f}, "
            f"loss {row['loss_total']:.4f} ({terms}), lambda {row['lambda']:.3f}, "
            f"val domain acc {row['val_domain_accuracy']:.3f}, val drift {drift}, val clean probe {probe}")


def objective_weights(options) -> dict:
    """Loss weights of ``options.objective``: reversal only, paired + mean only, both, or the teacher pull."""
    weights = {"domain": 1.0, "anchor": options.anchor_weight, "task": options.task_weight,
               "paired": options.paired_weight, "mean": options.mean_weight}
    if options.objective == "dann":  # Ganin et al., JMLR 2016: the adversary alone
        weights.update(paired=0.0, mean=0.0)
    elif options.objective == "paired":
        weights.update(domain=0.0)
    elif options.objective == "teacher":
        weights.update(domain=0.0, mean=0.0)
    return weights


def _warmup_steps(options) -> float:
    """Steps of the linear learning-rate warm-up (at least one)."""
    return max(1.0, WARMUP_SHARE * options.steps)


def learning_rate(options, p: float) -> float:
    """The learning rate at training progress ``p``: a linear warm-up, then DANN's annealing
    (constant without an adversary).

    The annealing ``lr / (1 + 10 p) ** 0.75`` belongs to the adversarial schedule; it ends
    at 0.17 of the start, which starved the teacher pull of a few hundred steps (digits:
    14% of the gap closed annealed, 48% constant, docs/alignment.md). The warm-up rises
    linearly over the first :data:`WARMUP_SHARE` of the steps: Adam's first steps move
    every weight by about the learning rate whatever its gradient, and on the panel's
    plain Sequential CNN (no normalisation) one such step moved features by 0.39 of their
    spread and took the task loss from 1.9 to 298 within 20 steps; with the warm-up it
    stayed under 1.4 (gradual warm-up: Goyal et al., "Accurate, large minibatch SGD",
    2017, section 2.2).
    """
    warm = min(1.0, (p * options.steps + 1.0) / _warmup_steps(options))
    if options.objective == "teacher":
        return warm * options.learning_rate
    return warm * dann_learning_rate(p, options.learning_rate)


def _snapshot(module: nn.Module) -> dict:
    return {k: v.detach().clone() for k, v in module.state_dict().items()}


class _Training:
    """One pass of the DANN loop over ``options.steps`` steps, validated every EVAL_EVERY."""

    def __init__(self, run: _Run, options, reporter, batch_callback):
        self.run, self.options, self.reporter, self.batch_callback = run, options, reporter, batch_callback
        self.weights = objective_weights(options)
        self.optimizer = torch.optim.Adam(run.parameters(), lr=options.learning_rate)
        self.curves = _empty_curves()
        self.kinds = {t["name"]: t["kind"] for t in run.tasks}
        self.sums, self.count = {}, 0
        self.failures = 0

    def start(self) -> None:
        """Row 0: the losses of the first batch untrained, and the slice as it starts."""
        with torch.no_grad():
            first = self.run.losses(self.run.train_pos[:self.options.batch_size], 0.0, self.weights)
        val = self.run.validate()
        self.probes0 = val["probes"]
        self._log(0, {k: float(v) for k, v in first.items()}, 0.0, self.options.learning_rate, val)
        self.best = {"state": _snapshot(self.run.tail), "drift": val["drift"], "step": 0}

    def step(self, step: int) -> tuple[float, float]:
        """One Adam step at ``step``; returns the schedules' (lambda, learning rate)."""
        p = step / self.options.steps
        lambda_, lr = dann_lambda(p), learning_rate(self.options, p)
        for group in self.optimizer.param_groups:
            group["lr"] = lr
        batch = self.run.next_batch(self.options.batch_size)
        if self.batch_callback is not None:
            self.batch_callback(batch)
        parts = self.run.losses(batch, lambda_, self.weights)
        self.optimizer.zero_grad(set_to_none=True)
        parts["total"].backward()
        self.optimizer.step()
        for k, v in parts.items():
            self.sums[k] = self.sums.get(k, 0.0) + float(v.detach())
        self.count += 1
        return lambda_, lr

    def evaluate(self, step: int, lambda_: float, lr: float) -> str | None:
        """Check the slice, keep the best state; returns why to stop, or None."""
        val = self.run.validate()
        self._log(step, {k: v / self.count for k, v in self.sums.items()}, lambda_, lr, val)
        self.sums, self.count = {}, 0
        failure = _guard_failure(self.probes0, val["probes"], self.options.guard_margin, self.kinds,
                                 len(self.run.val_pos))
        if failure is None and val["drift"] < self.best["drift"]:
            self.best = {"state": _snapshot(self.run.tail), "drift": val["drift"], "step": step}
        # A state that fails the guard is never kept; training stops only when the guard
        # fails GUARD_PATIENCE checks in a row, so one noisy slice check does not end a run
        # that recovers (common practice for early stopping with patience). Checks inside
        # the warm-up do not count: the features are in transit there (the workbench CNN
        # trained whole dipped from 0.97 to 0.86 over steps 20-40 and was back at 0.93 by
        # step 80, where it went on to close 57% of the held-out gap; docs/alignment.md).
        warming = step <= _warmup_steps(self.options)
        self.failures = self.failures + 1 if failure and not warming else 0
        return failure if self.failures >= GUARD_PATIENCE else None

    def _log(self, step, means, lambda_, lr, val) -> None:
        _record(self.curves, step, means, lambda_, lr, val)
        self.reporter.note(progress_line(self.curves, self.options.steps))


def estimate_seconds(training: "_Training", validate_seconds: float) -> float:
    """Seconds the training should take: one timed trial step (no update) times the steps,
    plus one slice check (timed at step 0) per EVAL_EVERY steps."""
    batch = training.run.next_batch(training.options.batch_size)
    training.run._queue = np.concatenate([batch, training.run._queue])  # the trial consumes no batch
    start = time.perf_counter()
    parts = training.run.losses(batch, 0.0, training.weights)
    parts["total"].backward()
    training.optimizer.zero_grad(set_to_none=True)
    step_seconds = time.perf_counter() - start
    steps = training.options.steps
    return steps * step_seconds + math.ceil(steps / EVAL_EVERY) * validate_seconds


def train(run: _Run, options, reporter, batch_callback=None, deadline: float | None = None) -> tuple[dict, dict]:
    """The DANN loop with validation every EVAL_EVERY steps.

    The schedules follow the steps, not the clock, so a run is reproducible whatever the
    machine's speed; a deadline only stops the loop early, and the run says so
    (``cut_short``).

    Parameters
    ----------
    run : _Run
    options : invariance.options.AlignmentOptions
    reporter : invariance.progress.Reporter
        Receives the time estimate and one line per validation.
    batch_callback : callable, optional
        Called with the positions of every training batch.
    deadline : float, optional
        ``time.perf_counter()`` value at which training stops (the command's ``minutes``
        less what caching and held-out scoring need).

    Returns
    -------
    state : dict
        The tail's state with the lowest validation drift (step 0 included).
    info : dict
        ``steps_run``, ``stopped_because``, ``cut_short``, ``curves``, ``best_step``,
        ``seconds``, ``estimated_seconds``.
    """
    training = _Training(run, options, reporter, batch_callback)
    run.tail.eval()
    start_time = time.perf_counter()
    step, stopped = 0, f"steps: ran all {options.steps} steps"
    training.start()
    estimate = estimate_seconds(training, time.perf_counter() - start_time)
    reporter.note(f"align: {options.steps} steps should take about {estimate:.0f} s on this machine now")
    try:
        while step < options.steps:
            if deadline is not None and time.perf_counter() >= deadline:
                stopped = (f"minutes: the {options.minutes} minute limit was reached after {step} of "
                           f"{options.steps} steps")
                break
            lambda_, lr = training.step(step)
            step += 1
            if step % EVAL_EVERY == 0 or step == options.steps:
                failure = training.evaluate(step, lambda_, lr)
                if failure:
                    stopped = failure
                    break
    except KeyboardInterrupt:
        stopped = "interrupted"
    info = {"steps_run": step, "stopped_because": stopped, "cut_short": stopped.startswith("minutes:"),
            "curves": training.curves, "best_step": training.best["step"],
            "seconds": time.perf_counter() - start_time, "estimated_seconds": estimate}
    return training.best["state"], info
