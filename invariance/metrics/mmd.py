"""Kernel two-sample test (MMD) for paired clean / cluttered features.

Gaussian kernel with the median-heuristic bandwidth, unbiased MMD^2 (Gretton et al.,
JMLR 13, 2012) and a permutation test that swaps the two images *within* pairs, the
exchangeable null for paired data. The B permutations are B quadratic forms over one
n x n matrix, evaluated in blocks. ``PairedKernel`` builds that matrix once for all pairs
and tests any subset (a breakdown subgroup) on a slice of it.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial.distance import pdist

from invariance.errors import InvarianceError
from invariance.metrics.domain import _check_int, _validate_pairs, _validate_samples, check_groups, grouping_info, sample_groups

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


def _squared_blocks(X, Y, dtype):
    """Squared distances |x_i-x_j|^2, |y_i-y_j|^2, |x_i-y_j|^2 of X / s and Y / s, and s.

    s = max |feature| keeps float32 squares finite; distances scale by s, so the median
    and the bandwidth are multiplied back by it. Also the squared row norms, for telling
    a zero distance from rounding.
    """
    scale = float(max(np.max(np.abs(X)), np.max(np.abs(Y)), np.finfo(np.float64).tiny))
    X = (X / scale).astype(dtype, copy=False)
    Y = (Y / scale).astype(dtype, copy=False)
    nx, ny = (X * X).sum(1), (Y * Y).sum(1)
    blocks = []
    for A, na, B, nb in ((X, nx, X, nx), (Y, ny, Y, ny), (X, nx, Y, ny)):
        sq = A @ B.T
        sq *= dtype.type(-2.0)
        sq += na[:, None]
        sq += nb[None, :]
        # rounding can make |a - b|^2 slightly negative for near-identical rows
        np.maximum(sq, 0.0, out=sq)
        blocks.append(sq)
    return blocks, (nx, ny), scale


def _block_median(blocks, norms, scale, max_points=MEDIAN_MAX_POINTS):
    """``median_bandwidth`` of the pooled rows [X; Y], read from the squared-distance blocks.

    The same rows as ``median_bandwidth`` (all 2n, or ``max_points`` evenly spaced), the
    same distances up to rounding, without a second pass over the features. Squared
    distances within rounding of zero are duplicates, left out as ``median_bandwidth``
    leaves out zeros: |a|^2 + |b|^2 - 2 a.b loses about eps of the squared norms to
    cancellation, and 16 eps of the largest one keeps a margin (common practice for
    rounding guards).
    """
    sxx, syy, sxy = blocks
    n = sxx.shape[0]
    rows = np.arange(2 * n)
    if rows.size > max_points:
        rows = np.linspace(0, 2 * n - 1, max_points).round().astype(int)
    a, b = rows[rows < n], rows[rows >= n] - n
    whole = a.size == n and b.size == n
    xx, yy, xy = (sxx, syy, sxy) if whole else (sxx[np.ix_(a, a)], syy[np.ix_(b, b)], sxy[np.ix_(a, b)])
    values = np.concatenate([xx[np.triu_indices(a.size, 1)], yy[np.triu_indices(b.size, 1)], xy.ravel()])
    rounding = 16 * np.finfo(sxx.dtype).eps * float(max(norms[0].max(), norms[1].max()))
    values = values[values > rounding]
    if values.size == 0:
        raise InvarianceError(
            "all feature vectors are identical, so no kernel bandwidth can be chosen: "
            "check that the encoder output varies between images"
        )
    # the median of the distances: sqrt is monotone, so take the middle squared distances
    middle = sorted({(values.size - 1) // 2, values.size // 2})
    picked = np.sqrt(np.partition(values, middle)[middle].astype(np.float64))
    return float(picked.mean()) * scale


def _pair_from_squared(blocks, scale, bandwidth):
    """H from the squared-distance blocks (consumed in place), zero diagonal."""
    sxx, syy, sxy = blocks
    factor = sxx.dtype.type(-0.5 * (scale / bandwidth) ** 2)
    for sq in blocks:
        sq *= factor
        np.exp(sq, out=sq)
    H = sxx
    H += syy
    H -= sxy
    H -= sxy.T
    np.fill_diagonal(H, 0.0)
    return H


def _swap_statistics(H, signs):
    """s' H s / (n (n - 1)) for each row s of ``signs``, accumulated in float64."""
    n = H.shape[0]
    prod = signs.astype(H.dtype, copy=False) @ H
    return np.einsum("bi,bi->b", prod, signs, dtype=np.float64) / (n * (n - 1))


def _count_exceeding(H, observed, permutations, rng, groups=None):
    """How many of ``permutations`` random swap vectors reach the observed statistic.

    With ``groups`` (int codes per pair) one sign per group, shared by its pairs.
    """
    n = H.shape[0]
    units = n if groups is None else int(groups.max()) + 1
    # a swap and its negation give the same statistic; count rounding-level ties as ties
    tol = 1e-9 * max(1.0, abs(observed))
    block = max(1, min(permutations, _BLOCK_BYTES // (2 * n * H.itemsize)))
    exceed = 0
    done = 0
    while done < permutations:
        size = min(block, permutations - done)
        signs = rng.choice(np.array([-1.0, 1.0], dtype=H.dtype), size=(size, units))
        if groups is not None:
            signs = signs[:, groups]
        exceed += int((_swap_statistics(H, signs) >= observed - tol).sum())
        done += size
    return exceed


class PairedKernel:
    """The Gaussian pair matrix of one set of pairs, built once; tests on subsets slice it.

    ``H_ij = k(x_i,x_j) + k(y_i,y_j) - k(x_i,y_j) - k(y_i,x_j)`` (Gretton et al., JMLR 13,
    2012, the paired form of their unbiased MMD^2) over all pairs, with one bandwidth
    (the median heuristic on all pooled pairs unless given). The statistic of a subset of
    pairs only needs the rows and columns of that subset, so every subgroup of a
    breakdown is tested on a slice of the one matrix instead of a new kernel. The
    bandwidth depends on the pooled clean and cluttered rows only, which a swap within
    a pair leaves unchanged, so each subset's permutation test stays exact.

    Parameters
    ----------
    clean, cluttered : ndarray of shape (n_pairs, d)
        Paired features; row i of each is the same scene.
    bandwidth : float, optional
        Kernel length scale; default :func:`median_bandwidth` of all pooled rows.
    max_pairs : int, default=4000
        Largest matrix kept: with more pairs no whole matrix is built and each test
        builds the matrix of its own (subsampled) pairs.

    Raises
    ------
    InvarianceError
        Bad shapes, NaN rows, or features identical everywhere (no bandwidth).
    """

    def __init__(self, clean, cluttered, *, bandwidth=None, max_pairs=MAX_PAIRS):
        self.max_pairs = _check_int("max_pairs", max_pairs, MIN_PAIRS)
        self.clean, self.cluttered = _validate_pairs(clean, cluttered, min_pairs=2)
        self.n_pairs = n = self.clean.shape[0]
        self._whole = None
        if n > self.max_pairs:
            if bandwidth is None:
                bandwidth = median_bandwidth(np.vstack([self.clean, self.cluttered]))
            self.bandwidth = _check_bandwidth(bandwidth)
            return
        # the kernel's squared distances also give the median heuristic: one pass
        dtype = np.dtype(np.float64 if n <= FLOAT64_MAX_PAIRS else np.float32)
        blocks, norms, scale = _squared_blocks(self.clean, self.cluttered, dtype)
        if bandwidth is None:
            bandwidth = _block_median(blocks, norms, scale)
        self.bandwidth = _check_bandwidth(bandwidth)
        self._whole = _pair_from_squared(blocks, scale, self.bandwidth)

    def _matrix(self, rows):
        dtype = np.float64 if rows.size <= FLOAT64_MAX_PAIRS else np.float32
        return _pair_matrix(self.clean[rows], self.cluttered[rows], self.bandwidth, dtype)

    def _sub_matrix(self, rows):
        if self._whole is None:
            return self._matrix(rows)
        if rows.size == self.n_pairs:
            return self._whole
        return self._whole[np.ix_(rows, rows)]

    def test(self, indices=None, *, permutations=1000, seed=0, groups=None):
        """Paired permutation test of MMD^2 on the pairs ``indices`` (default all).

        Parameters
        ----------
        indices : array of int, optional
            Pairs tested, e.g. one subgroup of a breakdown.
        permutations : int, default=1000
            Number B of random swap vectors.
        seed : int, default=0
            Seed of the pair subsample (above ``max_pairs``) and of the swap vectors.
        groups : array-like of shape (n_pairs,), optional
            Group (episode) of every pair of the whole kernel (not only of ``indices``):
            one swap per group, shared by all its pairs, since frames of one episode are
            not independent draws. The statistic is unchanged; only its null is.

        Returns
        -------
        dict
            As :func:`paired_permutation_test`.
        """
        permutations = _check_int("permutations", permutations, 1)
        _check_int("seed", seed, 0)
        rows = np.arange(self.n_pairs) if indices is None else np.asarray(indices, dtype=np.intp)
        if rows.ndim != 1 or rows.size < MIN_PAIRS:
            raise InvarianceError(
                f"only {rows.size} pairs; the MMD permutation test needs at least {MIN_PAIRS}"
            )
        rng = np.random.default_rng(seed)
        method = "exact"
        if rows.size > self.max_pairs:
            rows = rows[np.sort(rng.choice(rows.size, size=self.max_pairs, replace=False))]
            method = f"subsample of {rows.size} pairs"
        H = self._sub_matrix(rows)
        codes = None
        if groups is not None:
            codes = check_groups(groups, self.n_pairs)
            codes = np.unique(codes[rows], return_inverse=True)[1]
        observed = float(_swap_statistics(H, np.ones((1, rows.size)))[0])
        exceed = _count_exceeding(H, observed, permutations, rng, codes)
        return {
            "grouping": grouping_info(codes, rows.size),
            "mmd2": observed,
            "p_value": (exceed + 1) / (permutations + 1),
            "permutations": permutations,
            "bandwidth": self.bandwidth,
            "method": method,
            "pairs_used": int(rows.size),
        }


def paired_permutation_test(
    clean, cluttered, *, permutations=1000, seed=0, bandwidth=None, max_pairs=MAX_PAIRS, groups=None
):
    """Permutation test of MMD^2 that swaps clean and cluttered within pairs.

    Under the null (clutter does not change the feature distribution) the two images
    of a scene are exchangeable, so flipping the sign vector s in {-1, +1}^n of the
    paired statistic s' H s / (n (n - 1)) draws from the null distribution (Gretton
    et al., JMLR 13, 2012; paired form of their U-statistic). s = 1 gives the observed
    MMD^2 (``mmd2_unbiased(..., paired=True)``). The p-value counts the observed
    statistic among the B + 1 (Phipson & Smyth, Stat. Appl. Genet. Mol. Biol. 9, 2010),
    so it is never 0 and P(p <= alpha) <= alpha under the null.

    Parameters
    ----------
    clean, cluttered : ndarray of shape (n_pairs, d)
        Paired features; row i of each is the same scene.
    permutations : int, default=1000
        Number B of random swap vectors.
    seed : int, default=0
        Seed of the swap vectors and of the pair subsample.
    bandwidth : float, optional
        Kernel length scale; default the median heuristic on all pooled pairs.
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
    if bandwidth is not None:
        bandwidth = _check_bandwidth(bandwidth)
    kernel = PairedKernel(clean, cluttered, bandwidth=bandwidth, max_pairs=max_pairs)
    return kernel.test(permutations=permutations, seed=seed, groups=groups)


def _unpaired_statistics(K, member):
    """Unbiased MMD^2 (Gretton et al., JMLR 13, 2012, Lemma 6) for each row of ``member``.

    ``K`` is the pooled kernel matrix with a zero diagonal; ``member`` (B x N, 0/1) marks
    the rows of sample X in each labelling, the rest being Y. All labellings are three
    quadratic forms with the one matrix.
    """
    x = member.astype(K.dtype, copy=False)
    y = 1.0 - x
    kx, ky = x @ K, y @ K
    sxx = np.einsum("bi,bi->b", kx, x, dtype=np.float64)
    syy = np.einsum("bi,bi->b", ky, y, dtype=np.float64)
    sxy = np.einsum("bi,bi->b", kx, y, dtype=np.float64)
    m, n = x.sum(1, dtype=np.float64), y.sum(1, dtype=np.float64)
    return sxx / (m * (m - 1)) + syy / (n * (n - 1)) - 2.0 * sxy / (m * n)


def _unpaired_subsample(codes, max_rows, rng):
    """Rows kept (sorted) when the pooled sample exceeds ``max_rows``: a seeded row sample."""
    if codes.size <= max_rows:
        return np.arange(codes.size), "exact"
    keep = np.sort(rng.choice(codes.size, size=max_rows, replace=False))
    return keep, f"subsample of {max_rows} rows"


def unpaired_permutation_test(a, b, *, groups_a=None, groups_b=None, permutations=1000, seed=0,
                              bandwidth=None, max_rows=MAX_PAIRS):
    """Two-sample MMD test of unpaired samples with the ordinary permutation null.

    Unbiased MMD^2 with a Gaussian kernel at the median-heuristic bandwidth of the pooled
    sample (Gretton, Borgwardt, Rasch, Schoelkopf & Smola, JMLR 13, 2012, Lemma 6); the
    null draws by permuting the domain labels over the pooled sample (their section 8),
    here over whole groups when groups are given: frames of one episode are correlated,
    so they move together, which keeps the test exact when episodes are the independent
    units. p = (b + 1) / (B + 1) (Phipson & Smyth 2010).

    Parameters
    ----------
    a, b : ndarray of shape (n_a, d), (n_b, d)
    groups_a, groups_b : array-like, optional
        Group (episode) of each row; default each row alone.
    permutations : int, default=1000
    seed : int, default=0
        Seed of the permutations and of a row subsample above ``max_rows``.
    bandwidth : float, optional
        Kernel length scale; default the median heuristic of the pooled rows.
    max_rows : int, default=4000
        Pooled rows kept at most (a seeded subsample bounds the N x N kernel).

    Returns
    -------
    dict
        ``mmd2``, ``p_value``, ``permutations``, ``bandwidth``, ``method``, ``rows_used``
        ([n_a, n_b] after any subsample) and ``grouping``.
    """
    permutations = _check_int("permutations", permutations, 1)
    _check_int("seed", seed, 0)
    a, b = _validate_samples(a, b)
    if min(a.shape[0], b.shape[0]) < MIN_PAIRS // 2:
        raise InvarianceError(f"MMD needs at least {MIN_PAIRS // 2} rows per domain; got {a.shape[0]} and {b.shape[0]}")
    codes = sample_groups(groups_a, groups_b, a.shape[0], b.shape[0])
    is_b = np.r_[np.zeros(a.shape[0], bool), np.ones(b.shape[0], bool)]
    rng = np.random.default_rng(seed)
    keep, method = _unpaired_subsample(codes, _check_int("max_rows", max_rows, MIN_PAIRS), rng)
    Z = np.vstack([a, b])[keep].astype(np.float64)
    codes, is_b = np.unique(codes[keep], return_inverse=True)[1], is_b[keep]
    bandwidth = median_bandwidth(Z) if bandwidth is None else _check_bandwidth(bandwidth)
    K = gaussian_kernel(Z, Z, bandwidth)
    np.fill_diagonal(K, 0.0)
    in_a_of_group = np.ones(codes.max() + 1, dtype=bool)
    in_a_of_group[codes[is_b]] = False
    observed = float(_unpaired_statistics(K, (~is_b)[None, :])[0])
    tol = 1e-9 * max(1.0, abs(observed))
    block = max(1, min(permutations, _BLOCK_BYTES // (3 * Z.shape[0] * 8)))
    exceed, done = 0, 0
    while done < permutations:
        size = min(block, permutations - done)
        member = np.stack([in_a_of_group[rng.permutation(in_a_of_group.size)] for _ in range(size)])[:, codes]
        exceed += int((_unpaired_statistics(K, member) >= observed - tol).sum())
        done += size
    return {
        "mmd2": observed, "p_value": (exceed + 1) / (permutations + 1), "permutations": permutations,
        "bandwidth": bandwidth, "method": method,
        "rows_used": [int((~is_b).sum()), int(is_b.sum())],
        "grouping": {"unit": "group" if groups_a is not None or groups_b is not None else "row",
                     "groups": [int(np.unique(codes[~is_b]).size), int(np.unique(codes[is_b]).size)]},
        "null": "domain labels permuted over the pooled sample"
                + (" (whole groups)" if groups_a is not None or groups_b is not None else ""),
    }
