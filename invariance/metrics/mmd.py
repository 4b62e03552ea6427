"""Kernel two-sample test (MMD) for paired clean / cluttered features.

Gaussian kernel with the median-heuristic bandwidth, unbiased MMD^2 (Gretton et al.,
JMLR 13, 2012) and a permutation test that swaps the two images *within* pairs, the
exchangeable null for paired data. The B permutations are B quadratic forms over one
n x n matrix, evaluated in blocks.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial.distance import pdist

from invariance.errors import InvarianceError
from invariance.metrics.domain import _check_int, _validate_pairs

# Points used for the median heuristic: pdist of 3,000 points is 4.5 million distances
# (36 MB), and the median of a larger sample moves little (common practice).
MEDIAN_MAX_POINTS = 3000

# Pairs used by the permutation test; above this a seeded subsample is taken so the
# n x n kernel matrix stays at most 4,000^2 float32 values (64 MB).
MAX_PAIRS = 4000

# Up to this many pairs the pair kernel matrix is float64 (32 MB); above it float32,
# (docs/design.md: never an n x n float64 matrix past a few thousand pairs).
FLOAT64_MAX_PAIRS = 2048

# Memory for one block of swap vectors and their products with the matrix (bytes).
_BLOCK_BYTES = 64 * 2**20

# The p-value resolution is 1 / (B + 1); fewer than this many pairs give so few distinct
# swaps (2^(n-1)) that the test is meaningless (common practice).
MIN_PAIRS = 10


def gaussian_kernel(X, Y, bandwidth):
    """Gaussian kernel matrix k(x, y) = exp(-|x - y|^2 / (2 l^2)).

    Parameters
    ----------
    X : ndarray of shape (n, d)
    Y : ndarray of shape (m, d)
    bandwidth : float
        The length scale l > 0.

    Returns
    -------
    ndarray of shape (n, m)
        In the floating dtype of ``X`` (float32 stays float32).
    """
    bandwidth = _check_bandwidth(bandwidth)
    X = np.asarray(X)
    Y = np.asarray(Y)
    dtype = np.result_type(X.dtype, Y.dtype, np.float32)
    # scaling by the bandwidth first keeps float32 squares of large features finite
    X = (X / bandwidth).astype(dtype, copy=False)
    Y = (Y / bandwidth).astype(dtype, copy=False)
    # |x|^2 + |y|^2 - 2 x.y built in place: one n x m array at a time
    sq = X @ Y.T
    sq *= dtype.type(-2.0)
    sq += (X * X).sum(1)[:, None]
    sq += (Y * Y).sum(1)[None, :]
    # rounding can make |x - y|^2 slightly negative for near-identical rows
    np.maximum(sq, 0.0, out=sq)
    sq *= dtype.type(-0.5)
    return np.exp(sq, out=sq)


def _check_bandwidth(bandwidth):
    try:
        value = float(bandwidth)
    except (TypeError, ValueError):
        value = float("nan")
    if not np.isfinite(value) or value <= 0:
        raise InvarianceError(f"bandwidth must be a finite number > 0; got {bandwidth!r}")
    return value


def median_bandwidth(Z, max_points=MEDIAN_MAX_POINTS):
    """Median heuristic: the median pairwise Euclidean distance of a pooled sample.

    The kernel size Gretton et al., JMLR 13 (2012) use in their experiments: the
    median distance between points of the pooled sample. Above ``max_points`` rows,
    ``max_points`` evenly spaced rows are used (deterministic, no seed needed).

    Parameters
    ----------
    Z : ndarray of shape (n, d)
        The pooled sample (clean and cluttered rows together).
    max_points : int, default=3000
        Rows used at most.

    Returns
    -------
    float
        The median of the non-zero pairwise distances (duplicate rows would otherwise
        drive it to 0).
    """
    _check_int("max_points", max_points, 2)
    Z = np.asarray(Z, dtype=np.float64)
    if Z.ndim != 2 or Z.shape[0] < 2:
        raise InvarianceError(
            f"median_bandwidth needs a 2-D array of >= 2 rows; got shape {Z.shape}"
        )
    if Z.shape[0] > max_points:
        Z = Z[np.linspace(0, Z.shape[0] - 1, max_points).round().astype(int)]
    dist = pdist(Z)
    dist = dist[dist > 0]
    if dist.size == 0:
        raise InvarianceError(
            "all feature vectors are identical, so no kernel bandwidth can be chosen: "
            "check that the encoder output varies between images"
        )
    return float(np.median(dist))


def mmd2_unbiased(X, Y, bandwidth, *, paired=False):
    """Unbiased estimate of the squared MMD with a Gaussian kernel.

    ``paired=False`` is Gretton et al., JMLR 13 (2012), Lemma 6 (any sample sizes):
    1/(m(m-1)) sum_{i!=j} k(x_i,x_j) + 1/(n(n-1)) sum_{i!=j} k(y_i,y_j)
    - 2/(mn) sum_{i,j} k(x_i,y_j).

    ``paired=True`` (equal sizes) is the U-statistic over pairs of the same paper,
    1/(n(n-1)) sum_{i!=j} h(z_i, z_j) with h = k(x_i,x_j) + k(y_i,y_j) - k(x_i,y_j)
    - k(y_i,x_j): it leaves out the within-pair terms k(x_i, y_i), which are biased
    when x_i and y_i are two views of one scene.

    Parameters
    ----------
    X : ndarray of shape (m, d)
    Y : ndarray of shape (n, d)
    bandwidth : float
        Gaussian kernel length scale l > 0.
    paired : bool, default=False
        Use the paired form (requires m == n).

    Returns
    -------
    float
    """
    X = np.asarray(X, dtype=np.float64)
    Y = np.asarray(Y, dtype=np.float64)
    m, n = X.shape[0], Y.shape[0]
    if m < 2 or n < 2:
        raise InvarianceError(f"MMD needs at least 2 rows per sample; got {m} and {n}")
    if paired and m != n:
        raise InvarianceError(f"paired MMD needs equal sample sizes; got {m} and {n}")
    kxx = gaussian_kernel(X, X, bandwidth)
    kyy = gaussian_kernel(Y, Y, bandwidth)
    kxy = gaussian_kernel(X, Y, bandwidth)
    within = (kxx.sum() - np.trace(kxx)) / (m * (m - 1))
    within += (kyy.sum() - np.trace(kyy)) / (n * (n - 1))
    if paired:
        return float(within - 2.0 * (kxy.sum() - np.trace(kxy)) / (n * (n - 1)))
    return float(within - 2.0 * kxy.sum() / (m * n))


def _pair_matrix(X, Y, bandwidth, dtype):
    """H_ij = k(x_i,x_j) + k(y_i,y_j) - k(x_i,y_j) - k(y_i,x_j) with a zero diagonal."""
    X = X.astype(dtype, copy=False)
    Y = Y.astype(dtype, copy=False)
    H = gaussian_kernel(X, X, bandwidth)
    H += gaussian_kernel(Y, Y, bandwidth)
    kxy = gaussian_kernel(X, Y, bandwidth)
    H -= kxy
    H -= kxy.T
    del kxy
    np.fill_diagonal(H, 0.0)
    return H


def _swap_statistics(H, signs):
    """s' H s / (n (n - 1)) for each row s of ``signs``, accumulated in float64."""
    n = H.shape[0]
    prod = signs.astype(H.dtype, copy=False) @ H
    return np.einsum("bi,bi->b", prod, signs, dtype=np.float64) / (n * (n - 1))


def paired_permutation_test(
    clean, cluttered, *, permutations=1000, seed=0, bandwidth=None, max_pairs=MAX_PAIRS
):
    """Permutation test of MMD^2 that swaps clean and cluttered within pairs.

    Under the null (clutter does not change the feature distribution) the two images
    of a scene are exchangeable, so flipping the sign vector s in {-1, +1}^n of the
    paired statistic s' H s / (n (n - 1)) draws from the null distribution (Gretton
    et al., JMLR 13, 2012; paired form of their U-statistic). s = 1 gives the observed
    MMD^2 (``mmd2_unbiased(..., paired=True)``).

    Parameters
    ----------
    clean, cluttered : ndarray of shape (n_pairs, d)
        Paired features; row i of each is the same scene.
    permutations : int, default=1000
        Number B of random swap vectors.
    seed : int, default=0
        Seed of the swap vectors and of the pair subsample.
    bandwidth : float, optional
        Kernel length scale; default the median heuristic on the pooled pairs used.
    max_pairs : int, default=4000
        Above this many pairs, a seeded random subsample of ``max_pairs`` pairs is
        tested (reported in ``method``) to bound memory.

    Returns
    -------
    dict
        ``mmd2``, ``p_value`` = (b + 1) / (B + 1) with b the number of swaps whose
        statistic is >= the observed one, ``permutations``, ``bandwidth``, ``method``
        ("exact" or "subsample of N pairs") and ``pairs_used``.
    """
    permutations = _check_int("permutations", permutations, 1)
    max_pairs = _check_int("max_pairs", max_pairs, MIN_PAIRS)
    _check_int("seed", seed, 0)
    clean, cluttered = _validate_pairs(clean, cluttered, min_pairs=MIN_PAIRS)
    rng = np.random.default_rng(seed)
    n = clean.shape[0]
    method = "exact"
    if n > max_pairs:
        keep = np.sort(rng.choice(n, size=max_pairs, replace=False))
        clean, cluttered = clean[keep], cluttered[keep]
        n = max_pairs
        method = f"subsample of {n} pairs"
    if bandwidth is None:
        bandwidth = median_bandwidth(np.vstack([clean, cluttered]))
    bandwidth = _check_bandwidth(bandwidth)
    dtype = np.float64 if n <= FLOAT64_MAX_PAIRS else np.float32
    H = _pair_matrix(clean, cluttered, bandwidth, dtype)
    observed = float(_swap_statistics(H, np.ones((1, n)))[0])
    # a swap and its negation give the same statistic; count rounding-level ties as ties
    tol = 1e-9 * max(1.0, abs(observed))
    block = max(1, min(permutations, _BLOCK_BYTES // (2 * n * H.itemsize)))
    exceed = 0
    done = 0
    while done < permutations:
        size = min(block, permutations - done)
        signs = rng.choice(np.array([-1.0, 1.0], dtype=H.dtype), size=(size, n))
        exceed += int((_swap_statistics(H, signs) >= observed - tol).sum())
        done += size
    return {
        "mmd2": observed,
        "p_value": (exceed + 1) / (permutations + 1),
        "permutations": permutations,
        "bandwidth": bandwidth,
        "method": method,
        "pairs_used": n,
    }
