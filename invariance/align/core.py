"""The public entry point: align an encoder, save the checkpoint, measure before and after."""

from __future__ import annotations

import copy
import os
import time
from pathlib import Path

import numpy as np
import torch

from .._io import check_writable
from ..encoders import Encoder
from ..errors import InvalidParameter
from ..data import label_columns, pair_groups
from ..metrics.drift import paired_drift_change
from ..options import AlignmentOptions, ExtractionOptions, ScoringOptions, options_or_default
from ..progress import as_reporter
from .heads import _build_tasks, _check_labels, _standardiser
from .loop import LOSS_NAMES, _Run, train
from .monitor import carried
from .outcome import judge
from .splits import split_pairs, validation_slice
from .trunk import SPLIT_CHECK_IMAGES, TAIL_FLOP_BUDGET, preprocessed, split_module, tail_features, trunk_activations


class AlignmentInterrupted(KeyboardInterrupt):
    """Ctrl-C during alignment: the best state so far was saved to ``checkpoint``.

    Parameters
    ----------
    checkpoint : path
        Where the best state so far was saved.
    steps_run : int
        Training steps done before the interrupt.
    """

    def __init__(self, checkpoint: Path, steps_run: int):
        super().__init__(f"alignment interrupted after {steps_run} steps; best state so far saved to {checkpoint}")
        self.checkpoint = Path(checkpoint)
        self.steps_run = steps_run


def align_encoder(pairs, encoder, *, out, options: AlignmentOptions | None = None,
                  scoring: ScoringOptions | None = None, extraction: ExtractionOptions | None = None,
                  progress=True, batch_callback=None) -> dict:
    """Align an encoder's last stage(s) so clean and cluttered views give the same features.

    Domain-adversarial training (DANN): a discriminator (D -> 64 -> 1, logistic loss)
    sees clean and cluttered features through a gradient reversal layer whose weight
    follows ``lambda_p = 2 / (1 + exp(-10 p)) - 1``; the learning rate rises linearly over
    the first tenth of the steps, then follows ``lr / (1 + 10 p) ** 0.75``, with Adam in
    place of the paper's SGD, which converges in the few hundred steps a CPU run affords
    (common practice). The loss is

        domain + anchor_weight * anchor + task_weight * task + paired_weight * paired
               + mean_weight * lambda_p * mean

    ``anchor`` keeps clean features near the original encoder's, ``task`` keeps one
    held linear head (the original features' probe) per label column the encoder carries (clean probe
    significantly above chance on the validation slice), ``paired`` is the batch's
    relative cosine drift, and ``mean`` pulls the mean cluttered feature onto the mean
    clean one in whitened coordinates, over its starting value (see
    :mod:`invariance.align.losses`); ``options.objective`` keeps all (``combined``), the
    reversal only (``dann``) or the paired and mean terms only (``paired``). The
    ``teacher`` objective drops the reversal and the mean term, pulls each
    cluttered view onto the original encoder's clean feature of its pair (per feature,
    in units of its clean spread), lets the held task heads read the cluttered view too,
    and keeps the learning rate constant (on blended digits, the whole network trained,
    it closed 38% of the held-out digit gap over three seeds where ``combined`` closed
    none; docs/alignment.md). Only the stages from ``options.train_from`` on are trained
    (default: the earliest stage whose forward costs at most
    :data:`invariance.align.trunk.TAIL_FLOP_BUDGET` per image, so a small encoder trains
    whole; split with torch.fx when the forward is not a chain); earlier stages run once
    and are cached. Every ``EVAL_EVERY`` steps (20) the
    validation slice is checked; the state with the lowest slice drift that passes the
    guard is kept, and training stops when a carried clean probe stays more than
    ``options.guard_margin`` below its start for three checks. The kept state is then
    judged on the held-out pairs, and its checkpoint is written only when it beats the
    original there (``improved``; the drift's fall must clear the noise of a paired
    bootstrap over the held-out pairs). The defaults and the measurements that chose them are
    in ``docs/alignment.md``.

    Every option is validated (by its options object) before any work, and the caller's
    global random state is left as it was: the seed ``scoring.seed`` drives local
    generators only, so one seed gives one result on a CPU.

    Parameters
    ----------
    pairs : invariance.data.PairSet
        Paired scenes; labels (optional) give the task heads and the clean probes.
    encoder : invariance.encoders.Encoder
        The encoder to align (not modified; a copy is trained).
    out : str or Path
        Checkpoint to write (atomically), loadable as ``checkpoint:OUT``.
    options : AlignmentOptions, optional
        How to train; default ``AlignmentOptions()``: steps=800, minutes=None,
        train_from=None (the earliest stage within the compute budget), held_out_fraction=0.3,
        anchor_weight=10, paired_weight=3, mean_weight=10, task_weight=1,
        learning_rate=0.001, guard_margin=0.05, batch_size=32 (pairs per step),
        objective=combined.
    scoring : ScoringOptions, optional
        Seed of the splits, initialisation and batch order, and the before/after scoring;
        default ``ScoringOptions()``: seed=0, permutations=1000, folds=5, tsne=False.
    extraction : ExtractionOptions, optional
        Images per forward pass (``batch_size``, also for caching the trunk) and the
        feature cache (``cache_dir``) of the before/after scoring; default
        ``ExtractionOptions()``: batch_size=32, cache_dir=None. Device and image size are
        the encoder's.
    progress : bool, callable or Reporter, default=True
        One line per validation (see :mod:`invariance.progress`); the rows themselves are
        the returned ``curves``.
    batch_callback : callable, optional
        Called with the data set pair indices of every training batch (for audits).

    Returns
    -------
    dict
        The result JSON's ``alignment`` object: ``before``, ``after`` (metrics on the
        held-out pairs), ``held_out_pairs``, ``align_pairs``, ``validation_pairs``,
        ``held_out_indices``, ``checkpoint``, ``train_from``, ``stopped_because``,
        ``steps_run``, ``best_step``, ``seconds``, ``settings`` and ``curves``; and
        ``improved`` (whether the kept state beat the original on the held-out pairs; when
        false no checkpoint is written and ``checkpoint`` is None), ``outcome`` (why, one
        line), ``cut_short`` (the minutes limit stopped training), ``estimated_seconds``,
        ``task_check`` (per task: clean probe on the validation slice, the floor it had
        to beat, and whether the encoder carries it) and ``drift_change`` (the held-out
        drift's relative fall with its paired bootstrap interval,
        :func:`invariance.metrics.drift.paired_drift_change`).

    Raises
    ------
    InvalidParameter
        A wrong option object or value, before anything is written.
    InvarianceError
        Too few pairs, labels that do not match, or a stage that cannot be trained.
    AlignmentInterrupted
        On Ctrl-C, after saving the best state so far to ``out``.

    References
    ----------
    Ganin & Lempitsky, "Unsupervised domain adaptation by backpropagation", ICML 2015.
    Ganin et al., "Domain-adversarial training of neural networks", JMLR 17 (2016) 59:1-35.
    Ledoit & Wolf, J. Multivariate Analysis 88 (2004) 365-411 (the whitening).
    Gretton et al., "A kernel two-sample test", JMLR 13 (2012) 723-773 (the mean term).
    """
    options = options_or_default(options, AlignmentOptions, "options")
    scoring = options_or_default(scoring, ScoringOptions, "scoring")
    extraction = options_or_default(extraction, ExtractionOptions, "extraction")
    if not isinstance(encoder, Encoder):
        raise InvalidParameter("encoder", f"encoder={encoder!r} is not valid; pass an Encoder from load_encoder")
    if batch_callback is not None and not callable(batch_callback):
        raise InvalidParameter("batch_callback", f"batch_callback={batch_callback!r} is not valid; pass a callable")
    started = time.perf_counter()
    reporter, out, seed = as_reporter(progress), check_writable(out), scoring.seed
    _check_labels(pairs)  # before any work: a mismatch is the user's data, not a crash later
    groups = pair_groups(pairs)  # episodes stay whole on one side of every split
    align_idx, held_idx = split_pairs(len(pairs), held_out_fraction=options.held_out_fraction, seed=seed,
                                      folds=scoring.folds, groups=groups)
    train_idx, val_idx = validation_slice(align_idx, seed=seed, groups=groups)
    aligned, run, node, verdicts = _prepare(pairs, encoder, options, (align_idx, train_idx, val_idx),
                                            extraction.batch_size, seed)
    _announce(reporter, node, run, verdicts, options)
    held_out = pairs.subset(held_idx)
    scoring_start = time.perf_counter()
    before, before_features = _held_out_metrics(held_out, encoder, scoring, extraction)
    deadline = _training_deadline(options, started, time.perf_counter() - scoring_start)
    audit = None if batch_callback is None else (lambda pos: batch_callback(align_idx[pos]))
    state, info = train(run, options, reporter, audit, deadline)
    run.tail.load_state_dict(state)
    carried = [t["name"] for t in run.tasks]
    settings = {**options.settings(), "train_from": node, "seed": seed, "tasks": carried}
    if info["stopped_because"] == "interrupted":
        _save(out, encoder, aligned, pairs, settings, info, held_idx)
        raise AlignmentInterrupted(out, info["steps_run"])
    if info["cut_short"]:
        reporter.note(f"align: cut short by the {options.minutes} minute limit after {info['steps_run']} of "
                      f"{options.steps} steps; the figures depend on this machine's speed")
    after, improved, reason, change = _measure_and_keep(
        out, encoder, aligned, pairs, settings, info, held_idx,
        (before, before_features, carried, options.guard_margin), scoring, extraction)
    reporter.note(f"align: {'improved' if improved else 'not improved'}: {reason}")
    return {
        "before": before, "after": after,
        "held_out_pairs": len(held_idx), "align_pairs": len(align_idx), "validation_pairs": len(val_idx),
        "held_out_indices": held_idx.tolist(), "checkpoint": str(out) if improved else None, "train_from": node,
        "stopped_because": info["stopped_because"], "steps_run": info["steps_run"], "best_step": info["best_step"],
        "seconds": round(info["seconds"], 3), "settings": settings, "curves": info["curves"],
        "improved": improved, "outcome": reason, "drift_change": change, "cut_short": info["cut_short"],
        "estimated_seconds": round(info["estimated_seconds"], 1), "task_check": verdicts,
    }


# Share of the command's minutes held back beyond one held-out scoring's measured time, for
# saving and reloading the checkpoint (common practice).
_SCORING_HEADROOM = 1.25


def _training_deadline(options, started: float, scoring_seconds: float) -> float | None:
    """When training must stop so that the whole command fits ``options.minutes``."""
    if options.minutes is None:
        return None
    return started + 60.0 * options.minutes - _SCORING_HEADROOM * scoring_seconds


def _announce(reporter, node, run, verdicts, options) -> None:
    share = sum(p.numel() for p in run.tail.parameters()) / max(run.total_parameters, 1)
    how = ("--train-from" if options.train_from is not None else
           f"the earliest stage whose forward costs at most {TAIL_FLOP_BUDGET / 1e6:.0f} MFLOP per image")
    reporter.note(f"align: training from {node!r} ({share:.0%} of the encoder's parameters; {how}), "
                  f"objective {options.objective}")
    if not verdicts:
        reporter.note("align: no task labels; alignment runs on the unsupervised terms and the guard has "
                      "nothing to watch")
        return
    for name, v in verdicts.items():
        state = "carried, guarded" if v["carried"] else "not carried (not guarded, no task head)"
        reporter.note(f"align: task {name!r}: clean probe {v['score']:.3f} on the validation slice, "
                      f"floor {v['floor']:.3f}: {state}")
    if not any(v["carried"] for v in verdicts.values()):
        reporter.note("align: the encoder carries none of the labelled tasks; the guard has nothing to watch")


def _measure_and_keep(out, encoder, aligned, pairs, settings, info, held_idx, judged, scoring, extraction):
    """Save the kept state beside ``out``, score it on the held-out pairs, keep it only if better."""
    before, before_features, carried, margin = judged
    held_out = pairs.subset(held_idx)
    staging = out.with_name(f".{out.name}.unjudged")
    _save(staging, encoder, aligned, pairs, settings, info, held_idx)
    try:
        after, after_features = _held_out_metrics(held_out, _reload(staging, encoder), scoring, extraction)
        # the same held-out pairs before and after, resampled together (a paired bootstrap)
        change = paired_drift_change(before_features, after_features, seed=scoring.seed,
                                     groups=pair_groups(held_out))
        improved, reason = judge(before, after, carried, margin, len(held_idx), change)
        if improved:
            os.replace(staging, out)
    finally:
        staging.unlink(missing_ok=True)
    if not improved:
        reason += "; no checkpoint written: the original encoder stays the better one"
    return after, improved, reason, change


def _prepare(pairs, encoder, options, indices, batch_size, seed):
    """The trained copy, its training run (cached activations, carried tasks' heads), its node and the task check."""
    align_idx, train_idx, val_idx = indices
    aligned = copy.deepcopy(encoder.module).eval()
    example = preprocessed([pairs.clean[i] for i in align_idx[:SPLIT_CHECK_IMAGES]], encoder)
    trunk, tail, node = split_module(aligned, options.train_from, example)
    aligned.requires_grad_(False)
    tail.requires_grad_(True)
    act_clean = trunk_activations([pairs.clean[i] for i in align_idx], encoder, trunk, batch_size)
    act_clut = trunk_activations([pairs.cluttered[i] for i in align_idx], encoder, trunk, batch_size)
    train_pos, val_pos = np.searchsorted(align_idx, train_idx), np.searchsorted(align_idx, val_idx)
    f0 = tail_features(tail, act_clean).cpu().numpy()
    mean, spread = _standardiser(f0[train_pos])
    tasks = {k: np.asarray(v)[align_idx] for k, v in _check_labels(pairs).items()}
    kinds = pairs.labels.task_kinds if pairs.labels is not None else {}
    built = _build_tasks(tasks, kinds, train_pos, (f0[train_pos] - mean) / spread)
    verdicts = carried(built, f0, train_pos, val_pos)
    built = [t for t in built if verdicts.get(t["name"], {}).get("carried")]
    head_input = (torch.as_tensor(mean, dtype=torch.float32, device=act_clean.device), spread)
    run = _Run(tail, act_clean, act_clut, train_pos, val_pos, built, head_input, seed,
               objective=options.objective)
    run.total_parameters = sum(p.numel() for p in aligned.parameters())
    return aligned, run, node, verdicts


def _reload(out: Path, encoder):
    """The saved checkpoint as an encoder, so "after" measures exactly what was written."""
    from ..encoders import load_encoder

    # the checkpoint's source is the encoder the caller handed over, so its code is trusted
    return load_encoder(f"checkpoint:{out}", device=str(encoder.device),
                        trusted_code=(encoder.source.get("spec", encoder.spec),))


def _held_out_metrics(pairs, encoder, scoring: ScoringOptions, extraction: ExtractionOptions) -> tuple[dict, tuple]:
    """Held-out metrics (as ``invariance score``) and the ``(clean, cluttered)`` features behind them."""
    from ..encoders import extract_features
    from ..scoring import score_features

    clean, cluttered = extract_features(pairs, encoder, options=extraction, progress=False)["output"]
    tasks, factors = label_columns(pairs)
    metrics = score_features(clean, cluttered, tasks=tasks, factors=factors, names=list(pairs.names),
                             options=scoring)["metrics"]
    return metrics, (clean, cluttered)


def _save(out, encoder, aligned, pairs, settings, info, held_idx) -> None:
    from ..encoders import save_checkpoint

    curves = info["curves"]
    metadata = {
        "source_spec": encoder.spec,
        "data_content_hash": pairs.content_hash(),
        "settings": settings,
        "steps_run": info["steps_run"],
        "best_step": info["best_step"],
        "stopped_because": info["stopped_because"],
        "final_losses": {k: curves[f"loss_{k}"][-1] for k in LOSS_NAMES},
        "held_out_indices": held_idx.tolist(),
    }
    save_checkpoint(out, encoder=encoder, module=aligned, metadata=metadata)
