"""Paired drift: how far clutter moves each scene's feature, relative to a scene change."""

from __future__ import annotations

import numpy as np
from scipy.spatial.distance import pdist
from scipy.stats import bootstrap

from invariance.metrics.domain import _check_int, _validate_pairs

# Clean rows used for the typical between-scene distance: 3,000 rows give 4.5 million
# distances, plenty for a median (common practice). Evenly spaced rows, no seed needed.
TYPICAL_MAX_POINTS = 3000

# Bootstrap resamples for the interval of the mean; 2,000 is a usual choice for a 95%
# percentile interval (common practice; Efron & Tibshirani 1993 advise >= 1,000 for
# intervals, from memory).
BOOTSTRAP_RESAMPLES = 2000

# Rows of the clean x cluttered similarity computed at once for retrieval (memory bound).
_RETRIEVAL_BLOCK = 256

# Cosine distances below this are rounding of identical directions in float64.
_ROUNDING = 1e-12

# The between-scene median needs two different clean scenes and the interval a few pairs.
MIN_PAIRS = 3


def _unit_rows(A, norms):
    """Rows scaled to unit length, as a new float64 array (the input is left alone)."""
    unit = A.astype(np.float64)
    unit /= norms[:, None]
    return unit


def _half_squared_distance(A, B, block=_RETRIEVAL_BLOCK):
    """0.5 |a_i - b_i|^2 per row, in blocks so no second full-size temporary is made."""
    out = np.empty(A.shape[0])
    for start in range(0, A.shape[0], block):
        diff = A[start : start + block] - B[start : start + block]
        out[start : start + block] = 0.5 * np.einsum("ij,ij->i", diff, diff)
    return out


def _typical_distance(clean_unit):
    rows = clean_unit
    if rows.shape[0] > TYPICAL_MAX_POINTS:
        rows = rows[np.linspace(0, rows.shape[0] - 1, TYPICAL_MAX_POINTS).round().astype(int)]
    # cosine distance of unit vectors is half their squared Euclidean distance
    return float(np.median(0.5 * pdist(rows, "sqeuclidean")))


def _retrieval_top1(clean_unit, cluttered_unit):
    """Fraction of cluttered rows whose most cosine-similar clean row is their own pair."""
    clean32 = clean_unit.astype(np.float32)
    hits = 0
    for start in range(0, cluttered_unit.shape[0], _RETRIEVAL_BLOCK):
        block = cluttered_unit[start : start + _RETRIEVAL_BLOCK].astype(np.float32)
        best = (block @ clean32.T).argmax(axis=1)
        hits += int((best == np.arange(start, start + block.shape[0])).sum())
    return hits / cluttered_unit.shape[0]


def paired_drift(clean, cluttered, *, seed=0, resamples=BOOTSTRAP_RESAMPLES):
    """Per-pair cosine drift relative to the typical distance between clean scenes.

    The drift of pair i is (1 - cos(clean_i, cluttered_i)) divided by the median
    cosine distance between different clean scenes: 0 means clutter leaves the
    feature where it was, about 1 means clutter moves it as far as changing the scene
    (common practice; the normalisation makes layers and encoders comparable).

    Parameters
    ----------
    clean, cluttered : ndarray of shape (n_pairs, d)
        Paired features; row i of each is the same scene.
    seed : int, default=0
        Seed of the bootstrap.
    resamples : int, default=2000
        Bootstrap resamples of the mean.

    Returns
    -------
    dict
        ``relative_drift`` (mean over pairs), ``relative_drift_ci`` (95% percentile
        bootstrap interval over pairs, ``scipy.stats.bootstrap(method="percentile")``),
        ``ci_method``, ``typical_distance`` (median clean-clean cosine distance),
        ``per_pair`` (ndarray of shape (n_pairs,)) and ``pair_retrieval_top1``.
        ``{"not_computable": reason}`` for zero-norm rows or identical clean scenes.
    """
    _check_int("resamples", resamples, 100)
    _check_int("seed", seed, 0)
    clean, cluttered = _validate_pairs(clean, cluttered, min_pairs=MIN_PAIRS)
    clean_norms = np.linalg.norm(clean.astype(np.float64, copy=False), axis=1)
    cluttered_norms = np.linalg.norm(cluttered.astype(np.float64, copy=False), axis=1)
    zero = (clean_norms == 0) | (cluttered_norms == 0)
    if zero.any():
        return {
            "not_computable": f"{int(zero.sum())} pairs have an all-zero feature vector, "
            f"so their cosine distance is undefined"
        }
    clean_unit = _unit_rows(clean, clean_norms)
    cluttered_unit = _unit_rows(cluttered, cluttered_norms)
    typical = _typical_distance(clean_unit)
    if not typical > _ROUNDING:
        return {
            "not_computable": "the clean features of different scenes point the same "
            "way (median cosine distance 0), so there is no scene scale to compare with"
        }
    # 1 - cos written as half the squared distance of unit vectors keeps it >= 0
    per_pair = _half_squared_distance(clean_unit, cluttered_unit) / typical
    interval = _bootstrap_mean(per_pair, seed, resamples)
    return {
        "relative_drift": float(per_pair.mean()),
        "relative_drift_ci": interval,
        "ci_method": f"percentile bootstrap over pairs, {resamples} resamples, 95%",
        "typical_distance": typical,
        "per_pair": per_pair,
        "pair_retrieval_top1": _retrieval_top1(clean_unit, cluttered_unit),
    }


def _bootstrap_mean(values, seed, resamples):
    if np.ptp(values) == 0:
        # every resample has the same mean; scipy would warn about a degenerate sample
        return [float(values[0]), float(values[0])]
    res = bootstrap(
        (values,),
        np.mean,
        n_resamples=resamples,
        confidence_level=0.95,
        method="percentile",
        rng=np.random.default_rng(seed),
        # about 4 million resampled values (and their indices) in memory at a time
        batch=max(1, 2**22 // values.size),
    )
    return [float(res.confidence_interval.low), float(res.confidence_interval.high)]
