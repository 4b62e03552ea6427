"""Gaussian-kernel MMD and the within-pair permutation test."""

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.spatial.distance import pdist
from scipy.stats import norm
from sklearn.metrics.pairwise import rbf_kernel

from conftest import paired_gaussians
from invariance.errors import InvarianceError
from invariance.metrics import mmd
from invariance.metrics.mmd import (
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


def test_null_calibration_rejection_rate():
    # Null calibration (docs/design.md, statistics rules): within-pair exchangeable data, 120 repetitions,
    # alpha = 0.05; the permutation p-value (b+1)/(B+1) is valid, so the rejection rate
    # must stay near 5% (binomial 99.9% range for 120 trials is about 0-13%; the
    # 1-10% window is the brief's, common practice).
    rejections = 0
    reps = 120
    for seed in range(reps):
        x, y = _paired(40, 5, seed=1000 + seed)
        rejections += paired_permutation_test(x, y, permutations=200, seed=seed)["p_value"] <= 0.05
    rate = rejections / reps
    assert 0.01 <= rate <= 0.10, rate


def test_power_under_moderate_shift():
    # A shift of 0.3 noise-free standard deviations per coordinate in 5 dimensions
    # (common practice: a moderate effect) must be detected in >= 95% of repetitions.
    reps = 60
    detected = 0
    for seed in range(reps):
        x, y = _paired(40, 5, seed=2000 + seed, shift=0.3)
        detected += paired_permutation_test(x, y, permutations=200, seed=seed)["p_value"] <= 0.05
    assert detected / reps >= 0.95


def test_identical_sets_give_p_value_one():
    x, _ = _paired(20, 3, seed=7)
    result = paired_permutation_test(x, x.copy(), permutations=99)
    assert result["mmd2"] == 0.0
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
