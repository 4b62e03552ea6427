"""Splits of the pairs: held-out pairs, alignment pairs, and the validation slice.

Splits are over pairs, so both views of a scene land on the same side: a scene split across
sides would let the held-out score reward memorised scenes. Held-out pairs are never
trained on nor used to stop training; before and after are measured on them. The
validation slice is carved out of the alignment pairs and decides early stopping.
"""

from __future__ import annotations

import numpy as np

from ..errors import InvarianceError
from ..metrics.domain import MIN_PAIRS_PER_FOLD, check_groups
from ..options import DEFAULT_HELD_OUT_FRACTION, ScoringOptions
from ..validation import check_float, check_int, check_seed

# Share of the alignment pairs that forms the validation slice (common practice).
VALIDATION_FRACTION = 0.25
# Folds of the domain classifier on the validation slice: a slice of a few dozen pairs
# cannot fill more with two pairs each (common practice).
VALIDATION_FOLDS = 3
# The slice feeds the 3-fold domain classifier (at least MIN_PAIRS_PER_FOLD pairs per
# fold, 6) and the clean probes; 8 keeps two spare pairs for the probes (common practice).
_MIN_VALIDATION = max(8, MIN_PAIRS_PER_FOLD * VALIDATION_FOLDS)
# Fewer training pairs leave the warm-started task heads and the shrunk covariance of the
# mean-matching term fitted on a handful of scenes (common practice).
_MIN_TRAIN = 16
_DEFAULT_FOLDS = ScoringOptions().folds


def _split_sizes(n_pairs: int, held_out_fraction: float) -> tuple[int, int, int]:
    held_out = int(round(n_pairs * held_out_fraction))
    val = _validation_size(n_pairs - held_out)
    return held_out, val, n_pairs - held_out - val


def _validation_size(n_align: int) -> int:
    return max(_MIN_VALIDATION, int(round(n_align * VALIDATION_FRACTION)))


def _minimum_pairs(held_out_fraction: float, folds: int = _DEFAULT_FOLDS) -> int:
    """Fewest pairs that give every split its minimum.

    The held-out pairs must fill the ``folds`` folds of the before/after domain classifier
    with :data:`~invariance.metrics.domain.MIN_PAIRS_PER_FOLD` pairs each.
    """
    min_held_out = MIN_PAIRS_PER_FOLD * folds
    n = 1
    while True:
        held_out, val, train = _split_sizes(n, held_out_fraction)
        if held_out >= min_held_out and val >= _MIN_VALIDATION and train >= _MIN_TRAIN:
            return n
        n += 1


def _grouped_cut(rng, groups, n_first: int) -> tuple[np.ndarray, np.ndarray]:
    """Positions in a seeded order of whole groups: the first groups holding at least
    ``n_first`` rows, and the rest. With ``groups`` None every row is its own group."""
    inverse = check_groups(groups, len(groups))  # the metrics' own group codes (0..G-1)
    group_order = rng.permutation(inverse.max() + 1)
    place = np.empty_like(group_order)
    place[group_order] = np.arange(group_order.size)
    rank = place[inverse]
    order = np.argsort(rank, kind="stable")  # rows of one group stay adjacent
    rows_before = np.cumsum(np.bincount(rank))  # rows in the first k + 1 groups
    k = int(np.searchsorted(rows_before, n_first))  # the first k + 1 groups hold >= n_first rows
    cut = int(rows_before[k]) if k < rows_before.size else len(order)
    return order[:cut], order[cut:]


def split_pairs(n_pairs: int, *, held_out_fraction: float = DEFAULT_HELD_OUT_FRACTION, seed: int = 0,
                folds: int = _DEFAULT_FOLDS, groups=None) -> tuple[np.ndarray, np.ndarray]:
    """Split pair indices into alignment pairs and held-out pairs, seeded.

    Parameters
    ----------
    n_pairs : int
        Number of pairs in the data set.
    held_out_fraction : float, default=0.3
        Share of pairs kept out of training to measure before/after.
    seed : int, default=0
        Seed of the permutation.
    folds : int, default=5
        Folds of the held-out domain classifier; the held-out pairs must fill them.
    groups : array-like of shape (n_pairs,), optional
        Group (episode) of each pair: whole groups go to one side, the held-out side
        taking groups until it holds at least its share of pairs, so frames of one
        episode never train the alignment and judge it.

    Returns
    -------
    align_idx, held_out_idx : ndarray of int
        Sorted, disjoint, covering ``range(n_pairs)``.

    Raises
    ------
    InvarianceError
        When ``n_pairs`` is below the minimum for ``held_out_fraction`` and ``folds``.
    """
    held_out_fraction = check_float("held_out_fraction", held_out_fraction, low=0.05, high=0.8)
    folds = check_int("folds", folds, low=2, high=50)
    seed = check_seed(seed)
    minimum = _minimum_pairs(held_out_fraction, folds)
    if isinstance(n_pairs, bool) or not isinstance(n_pairs, (int, np.integer)) or n_pairs < minimum:
        raise InvarianceError(
            f"alignment needs at least {minimum} pairs with held_out_fraction={held_out_fraction} "
            f"(found {n_pairs}); add pairs to the data set (invariance scenes OUT --pairs N makes more)"
        )
    held_out, _, _ = _split_sizes(int(n_pairs), held_out_fraction)
    if groups is not None:
        held, align = _grouped_cut(np.random.default_rng(seed), groups, held_out)
        if align.size == 0:
            raise InvarianceError(f"the {len(np.unique(np.asarray(groups).astype(str)))} episodes cannot be split into "
                                  "alignment and held-out episodes; add episodes")
        return np.sort(align), np.sort(held)
    order = np.random.default_rng(seed).permutation(int(n_pairs))
    return np.sort(order[held_out:]), np.sort(order[:held_out])


def validation_slice(align_idx, *, seed: int = 0, groups=None) -> tuple[np.ndarray, np.ndarray]:
    """Split alignment pairs into training pairs and a validation slice for early stopping.

    Parameters
    ----------
    align_idx : array of int
        The alignment pairs from :func:`split_pairs`.
    seed : int, default=0
        Seed of the permutation (a stream separate from :func:`split_pairs`').

    Returns
    -------
    train_idx, val_idx : ndarray of int
        Sorted subsets of ``align_idx``; the slice is :data:`VALIDATION_FRACTION` of the
        pairs, at least 8.
    """
    align_idx = np.asarray(align_idx, dtype=int)
    n_val = _validation_size(len(align_idx))
    if len(align_idx) - n_val < _MIN_TRAIN:
        raise InvarianceError(
            f"{len(align_idx)} alignment pairs are too few; at least {_MIN_TRAIN + _MIN_VALIDATION} are needed"
        )
    # A seed stream separate from split_pairs', so the slice is not a prefix of that order.
    rng = np.random.default_rng([check_seed(seed), 1])
    if groups is not None:  # whole episodes, as in split_pairs
        val, train = _grouped_cut(rng, np.asarray(groups)[align_idx], n_val)
        if len(train) >= _MIN_TRAIN:
            return np.sort(align_idx[train]), np.sort(align_idx[val])
        raise InvarianceError(f"{len(align_idx)} alignment pairs in too few episodes to keep a validation "
                              "episode apart; add episodes")
    order = rng.permutation(len(align_idx))
    return np.sort(align_idx[order[n_val:]]), np.sort(align_idx[order[:n_val]])
