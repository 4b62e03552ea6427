"""The public entry point: align an encoder, save the checkpoint, measure before and after."""

from __future__ import annotations

import copy
from pathlib import Path

import numpy as np
import torch

from .._io import check_writable
from ..encoders import Encoder
from ..errors import InvalidParameter
from ..data import label_columns
from ..options import AlignmentOptions, ExtractionOptions, ScoringOptions, options_or_default
from ..progress import as_reporter
from .heads import _build_tasks, _check_labels, _standardiser
from .loop import LOSS_NAMES, _Run, train
from .splits import split_pairs, validation_slice
from .trunk import SPLIT_CHECK_IMAGES, preprocessed, split_module, tail_features, trunk_activations


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
    follows ``lambda_p = 2 / (1 + exp(-10 p)) - 1``; the learning rate follows
    ``lr / (1 + 10 p) ** 0.75``, with Adam in place of the paper's SGD, which converges in
    the few hundred steps a CPU run affords (common practice). The loss is

        domain + anchor_weight * anchor + task_weight * task + paired_weight * paired
               + mean_weight * lambda_p * mean

    ``anchor`` keeps clean features near the original encoder's, ``task`` keeps one
    warm-started linear head per label column, ``paired`` pulls each cluttered feature to
    its own scene's clean feature, and ``mean`` pulls the mean cluttered feature onto the
    mean clean one in whitened coordinates (see :mod:`invariance.align.losses`). Only the
    stages from ``options.train_from`` on are trained; earlier stages run once and are
    cached. Every ``EVAL_EVERY`` steps (20) the validation slice is checked; the state with
    the lowest slice drift is kept, and training stops when a clean probe falls more than
    ``options.guard_margin`` below its start. The defaults and the measurements that chose
    them are in ``docs/alignment.md``.

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
        train_from=None (the last stage with parameters), held_out_fraction=0.3,
        anchor_weight=10, paired_weight=3, mean_weight=10, task_weight=1,
        learning_rate=0.001, guard_margin=0.05, batch_size=32 (pairs per step).
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
        ``steps_run``, ``best_step``, ``seconds``, ``settings`` and ``curves``.

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
    reporter, out, seed = as_reporter(progress), check_writable(out), scoring.seed
    _check_labels(pairs)  # before any work: a mismatch is the user's data, not a crash later
    align_idx, held_idx = split_pairs(len(pairs), held_out_fraction=options.held_out_fraction, seed=seed,
                                      folds=scoring.folds)
    train_idx, val_idx = validation_slice(align_idx, seed=seed)
    aligned, run, node = _prepare(pairs, encoder, options.train_from, (align_idx, train_idx, val_idx),
                                  extraction.batch_size, seed)
    audit = None if batch_callback is None else (lambda pos: batch_callback(align_idx[pos]))
    state, info = train(run, options, reporter, audit)
    run.tail.load_state_dict(state)
    settings = {**options.settings(), "train_from": node, "seed": seed, "tasks": [t["name"] for t in run.tasks]}
    _save(out, encoder, aligned, pairs, settings, info, held_idx)
    if info["stopped_because"] == "interrupted":
        raise AlignmentInterrupted(out, info["steps_run"])
    held_out = pairs.subset(held_idx)
    before = _held_out_metrics(held_out, encoder, scoring, extraction)
    after = _held_out_metrics(held_out, _reload(out, encoder), scoring, extraction)
    return {
        "before": before, "after": after,
        "held_out_pairs": len(held_idx), "align_pairs": len(align_idx), "validation_pairs": len(val_idx),
        "held_out_indices": held_idx.tolist(), "checkpoint": str(out), "train_from": node,
        "stopped_because": info["stopped_because"], "steps_run": info["steps_run"], "best_step": info["best_step"],
        "seconds": round(info["seconds"], 3), "settings": settings, "curves": info["curves"],
    }


def _prepare(pairs, encoder, train_from, indices, batch_size, seed):
    """The trained copy, its training run (cached activations, warm-started heads) and its node."""
    align_idx, train_idx, val_idx = indices
    aligned = copy.deepcopy(encoder.module).eval()
    example = preprocessed([pairs.clean[i] for i in align_idx[:SPLIT_CHECK_IMAGES]], encoder)
    trunk, tail, node = split_module(aligned, train_from, example)
    trunk.requires_grad_(False)
    tail.requires_grad_(True)
    act_clean = trunk_activations([pairs.clean[i] for i in align_idx], encoder, trunk, batch_size)
    act_clut = trunk_activations([pairs.cluttered[i] for i in align_idx], encoder, trunk, batch_size)
    train_pos, val_pos = np.searchsorted(align_idx, train_idx), np.searchsorted(align_idx, val_idx)
    f0_train = tail_features(tail, act_clean[train_pos]).cpu().numpy()
    mean, spread = _standardiser(f0_train)
    tasks = {k: np.asarray(v)[align_idx] for k, v in _check_labels(pairs).items()}
    kinds = pairs.labels.task_kinds if pairs.labels is not None else {}
    built = _build_tasks(tasks, kinds, train_pos, (f0_train - mean) / spread)
    head_input = (torch.as_tensor(mean, dtype=torch.float32, device=act_clean.device), spread)
    return aligned, _Run(tail, act_clean, act_clut, train_pos, val_pos, built, head_input, seed), node


def _reload(out: Path, encoder):
    """The saved checkpoint as an encoder, so "after" measures exactly what was written."""
    from ..encoders import load_encoder

    # the checkpoint's source is the encoder the caller handed over, so its code is trusted
    return load_encoder(f"checkpoint:{out}", device=str(encoder.device),
                        trusted_code=(encoder.source.get("spec", encoder.spec),))


def _held_out_metrics(pairs, encoder, scoring: ScoringOptions, extraction: ExtractionOptions) -> dict:
    from ..encoders import extract_features
    from ..scoring import score_features

    clean, cluttered = extract_features(pairs, encoder, options=extraction, progress=False)["output"]
    tasks, factors = label_columns(pairs)
    return score_features(clean, cluttered, tasks=tasks, factors=factors, names=list(pairs.names),
                          options=scoring)["metrics"]


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
