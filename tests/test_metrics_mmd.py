"""Gaussian-kernel MMD and the within-pair permutation test."""

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.spatial.distance import pdist
from scipy.stats import binom, norm
from sklearn.metrics.pairwise import rbf_kernel
from threadpoolctl import threadpool_limits

from conftest import paired_gaussians
from nulls import null, shifted
from invariance.errors import InvarianceError
from invariance.metrics import mmd
from invariance.metrics.mmd import (
    PairedKernel,
    gaussian_kernel,
    median_bandwidth,
    mmd2_unbiased,
    paired_permutation_test,
)


def _paired(n, d, seed, shift=0.0, noise=0.5):
    return paired_gaussians(n, d, seed, shift, noise)


def test_kernel_equals_sklearn_rbf_kernel():
    # Reference: scikit-learn rbf_kernel, exp(-gamma |x - y|^2) with gamma = 1 / (2 l^2).
    rng = np.random.default_rng(0)
    X, Y = rng.standard_normal((30, 7)), rng.standard_normal((20, 7))
    for length in (0.5, 2.0, 9.0):
        expected = rbf_kernel(X, Y, gamma=1.0 / (2.0 * length**2))
        np.testing.assert_allclose(gaussian_kernel(X, Y, length), expected, rtol=1e-12, atol=1e-14)


def test_kernel_keeps_float32():
    rng = np.random.default_rng(1)
    X = rng.standard_normal((10, 4)).astype(np.float32)
    K = gaussian_kernel(X, X, 1.0)
    assert K.dtype == np.float32
    # Reference: scikit-learn rbf_kernel in float64; float32 rounding only.
    np.testing.assert_allclose(K, rbf_kernel(X.astype(np.float64), gamma=0.5), atol=1e-5)


def test_median_bandwidth_is_median_pairwise_distance():
    # Median heuristic (Gretton et al., JMLR 13, 2012): median of the pairwise distances;
    # reference scipy.spatial.distance.pdist.
    rng = np.random.default_rng(2)
    Z = rng.standard_normal((50, 6))
    assert median_bandwidth(Z) == pytest.approx(np.median(pdist(Z)), rel=1e-12)


def test_median_bandwidth_subsample_is_evenly_spaced_and_deterministic():
    rng = np.random.default_rng(3)
    Z = rng.standard_normal((101, 3))
    rows = np.linspace(0, 100, 20).round().astype(int)
    assert median_bandwidth(Z, max_points=20) == pytest.approx(np.median(pdist(Z[rows])))
    assert median_bandwidth(Z, max_points=20) == median_bandwidth(Z, max_points=20)


def test_median_bandwidth_identical_points_is_a_clear_error():
    with pytest.raises(InvarianceError, match="identical"):
        median_bandwidth(np.ones((10, 3)))


def _brute_force_lemma6(X, Y, length):
    k = lambda a, b: np.exp(-np.sum((a - b) ** 2) / (2 * length**2))  # noqa: E731
    m, n = len(X), len(Y)
    xx = sum(k(X[i], X[j]) for i in range(m) for j in range(m) if i != j) / (m * (m - 1))
    yy = sum(k(Y[i], Y[j]) for i in range(n) for j in range(n) if i != j) / (n * (n - 1))
    xy = sum(k(X[i], Y[j]) for i in range(m) for j in range(n)) / (m * n)
    return xx + yy - 2 * xy


def test_mmd2_unbiased_matches_lemma_6_by_loops():
    # Gretton et al., JMLR 13 (2012), Lemma 6, written out term by term (unequal sizes).
    rng = np.random.default_rng(4)
    X, Y = rng.standard_normal((9, 3)), rng.standard_normal((7, 3)) + 0.3
    assert mmd2_unbiased(X, Y, 1.3) == pytest.approx(_brute_force_lemma6(X, Y, 1.3), rel=1e-10)


def test_identity_swap_is_the_paired_unbiased_estimate():
    # Gretton et al., JMLR 13 (2012): for m = n, MMD2_u = 1/(n(n-1)) sum_{i!=j} h(z_i, z_j)
    # with h = k(x_i,x_j) + k(y_i,y_j) - k(x_i,y_j) - k(y_i,x_j); the swap vector s = 1
    # of the permutation test must give exactly this statistic.
    x, y = _paired(25, 4, seed=5, shift=0.4)
    length = 2.0
    n = len(x)
    h = np.zeros((n, n))
    for i in range(n):
        for j in range(n):
            if i != j:
                h[i, j] = (
                    gaussian_kernel(x[i : i + 1], x[j : j + 1], length)[0, 0]
                    + gaussian_kernel(y[i : i + 1], y[j : j + 1], length)[0, 0]
                    - gaussian_kernel(x[i : i + 1], y[j : j + 1], length)[0, 0]
                    - gaussian_kernel(y[i : i + 1], x[j : j + 1], length)[0, 0]
                )
    expected = h.sum() / (n * (n - 1))
    assert mmd2_unbiased(x, y, length, paired=True) == pytest.approx(expected, rel=1e-10)
    result = paired_permutation_test(x, y, bandwidth=length, permutations=10)
    assert result["mmd2"] == pytest.approx(expected, rel=1e-10)


def test_sign_flip_equals_swapping_the_pair():
    # Swapping the two images of pair i negates row and column i of H (common practice;
    # the symmetry the paired permutation test relies on).
    x, y = _paired(12, 3, seed=6, shift=0.2)
    H = mmd._pair_matrix(x, y, 1.5, np.float64)
    s = np.where(np.random.default_rng(0).random(12) < 0.5, -1.0, 1.0)
    xs = np.where(s[:, None] > 0, x, y)
    ys = np.where(s[:, None] > 0, y, x)
    flipped = mmd._swap_statistics(H, s[None, :])[0]
    assert flipped == pytest.approx(mmd2_unbiased(xs, ys, 1.5, paired=True), rel=1e-10)


def test_mmd2_approaches_gaussian_closed_form():
    r"""MMD^2 between N(0, s^2 I) and N(delta, s^2 I) with k(x,y) = exp(-|x-y|^2/(2 l^2)).

    Derivation (Gaussian integral; docs/references.md, "Kernel two-sample test"): if
    x - x' ~ N(mu, 2 s^2 I) in d dimensions, then per coordinate
    E exp(-u^2/(2 l^2)) for u ~ N(m, 2 s^2) equals
    sqrt(l^2/(l^2 + 2 s^2)) exp(-m^2/(2 (l^2 + 2 s^2))), so
    E k(x, x') = (l^2/(l^2 + 2 s^2))^(d/2) exp(-|mu|^2/(2 (l^2 + 2 s^2))).
    MMD^2 = E k(x,x') + E k(y,y') - 2 E k(x,y) with mu = 0, 0 and delta:
    MMD^2 = 2 (l^2/(l^2 + 2 s^2))^(d/2) (1 - exp(-|delta|^2/(2 (l^2 + 2 s^2)))).
    The unbiased estimate (Gretton et al., JMLR 13, 2012, Lemma 6) averaged over
    independent draws must approach it.
    """
    s, length, d = 1.0, 1.5, 3
    delta = np.array([1.0, 0.5, 0.0])
    c = length**2 + 2 * s**2
    closed = 2 * (length**2 / c) ** (d / 2) * (1 - np.exp(-(delta @ delta) / (2 * c)))
    estimates = []
    for seed in range(6):
        rng = np.random.default_rng(100 + seed)
        X = s * rng.standard_normal((800, d))
        Y = s * rng.standard_normal((800, d)) + delta
        estimates.append(mmd2_unbiased(X, Y, length))
    # standard error of the mean of 6 estimates is about 0.003 here
    assert np.mean(estimates) == pytest.approx(closed, abs=0.012)

    # the one-dimensional Gaussian integral of the derivation, by scipy quadrature
    m, var = delta[0], 2 * s**2
    integral, _ = quad(
        lambda u: np.exp(-(u**2) / (2 * length**2)) * norm.pdf(u, loc=m, scale=np.sqrt(var)),
        -np.inf,
        np.inf,
    )
    assert integral == pytest.approx(np.sqrt(length**2 / c) * np.exp(-(m**2) / (2 * c)), rel=1e-8)


# Calibration: a subset of the grid of tests/benchmarks/bench_mmd_calibration.py (which
# prints all 4 nulls x n in {60, 120, 400} x d in {16, 128, 512}). B = 199 makes
# alpha (B + 1) = 10 an integer, so P(p <= 0.05) is exactly 0.05 for an exact test
# (Phipson & Smyth, Stat. Appl. Genet. Mol. Biol. 9, 2010).
CALIBRATION_REPS = 200
CALIBRATION_B = 199


def _rejections(make, reps, seed):
    rejected = 0
    # one BLAS thread, as score_features runs it: tiny products stall on a shared machine
    with threadpool_limits(limits=1):
        for rep in range(reps):
            clean, cluttered = make(np.random.default_rng([seed, rep]))
            p = paired_permutation_test(clean, cluttered, permutations=CALIBRATION_B, seed=rep)["p_value"]
            rejected += p <= 0.05
    return rejected


@pytest.mark.parametrize(
    "kind, n, d",
    [("iid", 60, 16), ("paired_shared", 60, 512), ("heavy_tailed", 120, 128), ("relu_sparse", 60, 128)],
)
def test_null_rejection_rate_is_inside_the_binomial_band(kind, n, d):
    # Within-pair swaps are exchangeable under every null of tests/nulls.py, so the
    # permutation test is exact (Gretton et al., JMLR 13, 2012; Phipson & Smyth 2010): the
    # count of rejections at alpha = 0.05 in 200 runs is Binomial(200, 0.05) and must fall
    # inside its 99% interval (scipy.stats.binom.interval), here 3 to 19.
    low, high = binom.interval(0.99, CALIBRATION_REPS, 0.05)
    rejected = _rejections(lambda rng: null(kind, n, d, rng), CALIBRATION_REPS, seed=n + d)
    assert low <= rejected <= high, (kind, n, d, rejected)


@pytest.mark.parametrize("kind", ["paired_shared", "iid"])
def test_power_for_a_shift_in_a_quarter_of_the_coordinates(kind):
    # The alternative of the issue (common practice, no published source): a shift of 0.35
    # sd in a quarter of 32 coordinates at 120 pairs must be detected in >= 95% of runs.
    reps = 100
    detected = _rejections(lambda rng: shifted(kind, 120, 32, rng), reps, seed=7)
    assert detected / reps >= 0.95


def test_power_under_moderate_shift():
    # A shift of 0.3 noise-free standard deviations per coordinate in 5 dimensions
    # (common practice: a moderate effect) must be detected in >= 95% of repetitions.
    reps = 60
    detected = 0
    for seed in range(reps):
        x, y = _paired(40, 5, seed=2000 + seed, shift=0.3)
        detected += paired_permutation_test(x, y, permutations=200, seed=seed)["p_value"] <= 0.05
    assert detected / reps >= 0.95


def test_subset_test_slices_the_whole_matrix():
    # A subset's statistic only needs that subset's rows and columns of H (the U-statistic
    # of Gretton et al., JMLR 13, 2012 restricted to those pairs), so slicing the whole
    # matrix must give the standalone test on the subset with the same bandwidth and seed.
    x, y = _paired(50, 6, seed=15, shift=0.2)
    kernel = PairedKernel(x, y)
    assert kernel.bandwidth == pytest.approx(median_bandwidth(np.vstack([x, y])), rel=1e-12)
    subset = np.array([1, 4, 5, 9, 11, 20, 21, 30, 33, 40, 41, 49])
    sliced = kernel.test(subset, permutations=199, seed=3)
    alone = paired_permutation_test(x[subset], y[subset], bandwidth=kernel.bandwidth, permutations=199, seed=3)
    assert sliced["mmd2"] == pytest.approx(alone["mmd2"], rel=1e-12)
    assert sliced["p_value"] == alone["p_value"] and sliced["pairs_used"] == 12
    assert kernel.test(permutations=99, seed=1) == paired_permutation_test(x, y, permutations=99, seed=1)


@pytest.mark.parametrize("n", [30, 1510])
def test_kernel_bandwidth_is_the_median_heuristic_read_from_its_own_distances(n):
    # The kernel's squared distances give the median heuristic without pdist; it must be
    # median_bandwidth's (reference scipy.spatial.distance.pdist) on the same rows:
    # all 2n pooled rows, or 3,000 evenly spaced ones at n = 1,510; duplicates left out.
    x, y = _paired(n, 8, seed=17, shift=0.1)
    x[3], y[5] = x[2], x[7]
    kernel = PairedKernel(x, y)
    assert kernel.bandwidth == pytest.approx(median_bandwidth(np.vstack([x, y])), rel=1e-12)
    np.testing.assert_allclose(kernel._whole, mmd._pair_matrix(x, y, kernel.bandwidth, np.float64),
                               atol=1e-12)


def test_subset_above_max_pairs_builds_its_own_subsample():
    x, y = _paired(40, 3, seed=16, shift=0.2)
    kernel = PairedKernel(x, y, max_pairs=15)
    subset = np.arange(5, 35)
    result = kernel.test(subset, permutations=50, seed=4)
    keep = subset[np.sort(np.random.default_rng(4).choice(30, size=15, replace=False))]
    assert result["method"] == "subsample of 15 pairs"
    assert result["mmd2"] == pytest.approx(mmd2_unbiased(x[keep], y[keep], kernel.bandwidth, paired=True), rel=1e-10)
    with pytest.raises(InvarianceError, match="at least 10"):
        kernel.test(np.arange(4))


def test_identical_sets_give_p_value_one():
    x, _ = _paired(20, 3, seed=7)
    result = paired_permutation_test(x, x.copy(), permutations=99)
    # Zero in exact arithmetic; the kernel sums round at the 1e-19 level (common practice).
    assert result["mmd2"] == pytest.approx(0.0, abs=1e-12)
    assert result["p_value"] == 1.0


def test_p_value_is_b_plus_one_over_B_plus_one():
    x, y = _paired(15, 3, seed=8, shift=0.1)
    result = paired_permutation_test(x, y, permutations=57, seed=3)
    count = result["p_value"] * 58
    assert count == pytest.approx(round(count)) and 1 <= round(count) <= 58
    assert result["permutations"] == 57 and result["method"] == "exact"


def test_subsample_above_max_pairs_is_seeded_and_reported():
    x, y = _paired(60, 3, seed=9, shift=0.2)
    result = paired_permutation_test(x, y, permutations=50, seed=4, max_pairs=20)
    assert result["method"] == "subsample of 20 pairs" and result["pairs_used"] == 20
    keep = np.sort(np.random.default_rng(4).choice(60, size=20, replace=False))
    expected = mmd2_unbiased(x[keep], y[keep], result["bandwidth"], paired=True)
    assert result["mmd2"] == pytest.approx(expected, rel=1e-10)


def test_float32_matrix_gives_the_same_answer(monkeypatch):
    x, y = _paired(50, 4, seed=10, shift=0.15)
    exact = paired_permutation_test(x, y, permutations=300, seed=1)
    monkeypatch.setattr(mmd, "FLOAT64_MAX_PAIRS", 10)
    single = paired_permutation_test(x, y, permutations=300, seed=1)
    assert single["mmd2"] == pytest.approx(exact["mmd2"], rel=1e-4)
    assert single["p_value"] == exact["p_value"]


def test_block_size_does_not_change_the_result(monkeypatch):
    x, y = _paired(30, 4, seed=11, shift=0.1)
    whole = paired_permutation_test(x, y, permutations=100, seed=2)
    monkeypatch.setattr(mmd, "_BLOCK_BYTES", 30 * 8 * 2 * 7)  # blocks of 7 swap vectors
    blocked = paired_permutation_test(x, y, permutations=100, seed=2)
    assert blocked["p_value"] == whole["p_value"]


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"permutations": 0}, "permutations"),
        ({"bandwidth": -1.0}, "bandwidth"),
        ({"max_pairs": 3}, "max_pairs"),
    ],
)
def test_bad_parameters_are_clear_errors(kwargs, match):
    x, y = _paired(20, 3, seed=12)
    with pytest.raises(InvarianceError, match=match):
        paired_permutation_test(x, y, **kwargs)


def test_too_few_pairs_names_the_minimum():
    x, y = _paired(5, 3, seed=13)
    with pytest.raises(InvarianceError, match="at least 10"):
        paired_permutation_test(x, y)


def test_large_float32_features_do_not_overflow():
    # The Gaussian kernel with the median bandwidth is scale invariant: features scaled by
    # 1e20 (float32 squares would overflow) must give the same statistic and p-value.
    x, y = _paired(30, 4, seed=14, shift=0.3)
    small = paired_permutation_test(x.astype(np.float32), y.astype(np.float32), permutations=99)
    big = paired_permutation_test(
        (x * 1e20).astype(np.float32), (y * 1e20).astype(np.float32), permutations=99
    )
    assert np.isfinite(big["mmd2"])
    assert big["mmd2"] == pytest.approx(small["mmd2"], rel=1e-4)
    assert big["p_value"] == small["p_value"]
