"""Adversarial alignment of an encoder's last stage(s): clutter-invariant features on a CPU.

Domain-adversarial training (DANN) with a gradient reversal layer, plus an anchor on the
original clean features, held probe heads for the tasks the encoder carries, a paired
(relative drift) term and a mean-matching term; the frozen stages are cached so a step
costs only the trained tail. Held-out pairs are never trained on nor used to stop
training; before and after are measured on them, and the trained state is kept (its
checkpoint written) only when it beats the original there.

Modules: :mod:`~invariance.align.reversal` (gradient reversal, DANN schedules, the
discriminator), :mod:`~invariance.align.splits` (pair splits, validation slice),
:mod:`~invariance.align.trunk` (trunk/tail split, cached activations),
:mod:`~invariance.align.graph_split` (torch.fx split of non-chain encoders),
:mod:`~invariance.align.outcome` (the held-out verdict),
:mod:`~invariance.align.losses` (loss terms, whitening), :mod:`~invariance.align.heads`
(task heads), :mod:`~invariance.align.monitor` (validation-slice checks, clean-probe
guard), :mod:`~invariance.align.loop` (training loop, curves) and
:mod:`~invariance.align.core` (:func:`align_encoder`, saving). The defaults and their
measurements are in ``docs/alignment.md``.

References
----------
Ganin, Y. & Lempitsky, V. (2015). Unsupervised domain adaptation by backpropagation. ICML 2015.
Ganin, Y. et al. (2016). Domain-adversarial training of neural networks. JMLR 17, 59:1-35.
Ledoit, O. & Wolf, M. (2004). A well-conditioned estimator for large-dimensional covariance
matrices. J. Multivariate Analysis 88, 365-411.
Gretton, A. et al. (2012). A kernel two-sample test. JMLR 13, 723-773.
"""

from ..options import (
    DEFAULT_ANCHOR_WEIGHT,
    DEFAULT_GUARD_MARGIN,
    DEFAULT_HELD_OUT_FRACTION,
    DEFAULT_LEARNING_RATE,
    DEFAULT_MEAN_WEIGHT,
    DEFAULT_PAIRED_WEIGHT,
    DEFAULT_STEPS,
    DEFAULT_TASK_WEIGHT,
)
from .core import AlignmentInterrupted, align_encoder
from .losses import (
    PAIRED_VARIANCE_FLOOR,
    anchor_loss,
    domain_loss,
    mean_matching_loss,
    paired_drift_loss,
    paired_loss,
    paired_variance,
    whitening,
)
from .loop import EVAL_EVERY, LOSS_NAMES, progress_line
from .reversal import (
    DANN_GAMMA,
    DANN_LR_ALPHA,
    DANN_LR_BETA,
    DISCRIMINATOR_HIDDEN,
    GradientReversal,
    dann_lambda,
    dann_learning_rate,
    gradient_reversal,
    make_discriminator,
    seeded_linear,
)
from .outcome import judge, settle
from .splits import VALIDATION_FRACTION, split_pairs, validation_slice
from .trunk import TAIL_FLOP_BUDGET, split_module

__all__ = [
    "align_encoder", "AlignmentInterrupted",
    "gradient_reversal", "GradientReversal", "dann_lambda", "dann_learning_rate", "make_discriminator",
    "seeded_linear", "DANN_GAMMA", "DANN_LR_ALPHA", "DANN_LR_BETA", "DISCRIMINATOR_HIDDEN",
    "split_pairs", "validation_slice", "VALIDATION_FRACTION", "split_module", "TAIL_FLOP_BUDGET",
    "judge", "settle",
    "paired_drift_loss", "paired_loss", "paired_variance", "mean_matching_loss", "anchor_loss", "domain_loss",
    "whitening",
    "PAIRED_VARIANCE_FLOOR", "LOSS_NAMES", "EVAL_EVERY", "progress_line",
    "DEFAULT_STEPS", "DEFAULT_ANCHOR_WEIGHT", "DEFAULT_PAIRED_WEIGHT", "DEFAULT_MEAN_WEIGHT",
    "DEFAULT_TASK_WEIGHT", "DEFAULT_LEARNING_RATE", "DEFAULT_GUARD_MARGIN", "DEFAULT_HELD_OUT_FRACTION",
]
