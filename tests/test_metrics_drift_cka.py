"""Paired drift (relative cosine distance, pair retrieval) and linear CKA."""

import numpy as np
import pytest
from scipy.spatial.distance import cdist, pdist
from scipy.stats import ortho_group

from invariance.errors import InvarianceError
from invariance.metrics.cka import linear_cka
from invariance.metrics.drift import paired_drift


def _scenes(n=80, d=16, seed=0, noise=0.3):
    rng = np.random.default_rng(seed)
    clean = rng.standard_normal((n, d))
    return clean, clean + noise * rng.standard_normal((n, d))


def test_per_pair_drift_is_cosine_distance_over_median_scene_distance():
    # Reference: scipy.spatial.distance cosine distances (1 - cos).
    clean, cluttered = _scenes()
    r = paired_drift(clean, cluttered)
    typical = np.median(pdist(clean, "cosine"))
    expected = np.diag(cdist(clean, cluttered, "cosine")) / typical
    np.testing.assert_allclose(r["per_pair"], expected, rtol=1e-9)
    assert r["typical_distance"] == pytest.approx(typical)
    assert r["relative_drift"] == pytest.approx(expected.mean())


def test_retrieval_counts_own_pair_as_nearest_clean():
    # Reference: argmin of scipy cosine distances.
    clean, cluttered = _scenes(noise=1.2, seed=1)
    r = paired_drift(clean, cluttered)
    nearest = cdist(cluttered, clean, "cosine").argmin(axis=1)
    assert r["pair_retrieval_top1"] == pytest.approx(np.mean(nearest == np.arange(len(clean))))
    assert 0.0 < r["pair_retrieval_top1"] < 1.0


def test_identical_and_rescaled_features_do_not_drift():
    clean, _ = _scenes(seed=2)
    for cluttered in (clean.copy(), 3.5 * clean):
        r = paired_drift(clean, cluttered)
        assert r["relative_drift"] == pytest.approx(0.0, abs=1e-12)
        assert r["relative_drift_ci"][1] == pytest.approx(0.0, abs=1e-12)
        assert r["pair_retrieval_top1"] == 1.0


def test_changing_the_scene_is_drift_one():
    # Cluttered feature of another scene: drift is a between-scene distance, ~1 by design.
    clean, _ = _scenes(n=300, seed=3)
    r = paired_drift(clean, np.roll(clean, 1, axis=0))
    assert r["relative_drift"] == pytest.approx(1.0, abs=0.1)
    assert r["pair_retrieval_top1"] == 0.0


def test_bootstrap_interval_matches_the_normal_approximation():
    # Percentile bootstrap of a mean over 400 pairs: close to mean +- 1.96 sd / sqrt(n)
    # by the central limit theorem (common practice).
    clean, cluttered = _scenes(n=400, seed=4)
    r = paired_drift(clean, cluttered, seed=1)
    lo, hi = r["relative_drift_ci"]
    half = 1.96 * r["per_pair"].std(ddof=1) / np.sqrt(400)
    assert lo < r["relative_drift"] < hi
    assert (hi - lo) / 2 == pytest.approx(half, rel=0.2)
    assert paired_drift(clean, cluttered, seed=1)["relative_drift_ci"] == [lo, hi]


def test_degenerate_inputs_are_not_computable():
    clean, cluttered = _scenes(seed=5)
    cluttered[[3, 7]] = 0.0
    assert "2 pairs" in paired_drift(clean, cluttered)["not_computable"]
    same = np.ones((10, 4))
    assert "same way" in paired_drift(same, same + 1)["not_computable"]


def test_cka_of_a_matrix_with_itself_is_one():
    # Kornblith et al., ICML 2019: CKA(X, X) = 1.
    X = np.random.default_rng(6).standard_normal((50, 8))
    assert linear_cka(X, X) == pytest.approx(1.0)


def test_cka_invariances():
    # Kornblith et al., ICML 2019, section 3: invariant to orthogonal transforms and
    # isotropic scaling, not to general invertible linear maps.
    rng = np.random.default_rng(7)
    X = rng.standard_normal((60, 6)) * np.array([5, 3, 2, 1, 0.5, 0.2])
    Q = ortho_group.rvs(6, random_state=1)
    assert linear_cka(X, 2.7 * X @ Q) == pytest.approx(1.0, abs=1e-12)
    A = np.diag([1, 1, 1, 1, 20, 50]) @ rng.standard_normal((6, 6))
    assert linear_cka(X, X @ A) < 0.9


def _cka_by_hsic(X, Y):
    """Kornblith et al., ICML 2019, eq. 2-3: HSIC(K, L) = tr(KHLH) / (n-1)^2, linear kernels."""
    n = X.shape[0]
    H = np.eye(n) - np.ones((n, n)) / n
    K, L = X @ X.T, Y @ Y.T
    hsic = lambda a, b: np.trace(a @ H @ b @ H)  # noqa: E731
    return hsic(K, L) / np.sqrt(hsic(K, K) * hsic(L, L))


@pytest.mark.parametrize("d", [5, 120])  # feature form (d < n) and Gram form (d > n)
def test_cka_equals_hsic_form(d):
    rng = np.random.default_rng(8)
    X = rng.standard_normal((40, d))
    Y = X[:, : min(d, 30)] + rng.standard_normal((40, min(d, 30)))
    assert linear_cka(X, Y) == pytest.approx(_cka_by_hsic(X, Y), rel=1e-10)


def test_cka_of_independent_features_is_small():
    rng = np.random.default_rng(9)
    assert linear_cka(rng.standard_normal((500, 4)), rng.standard_normal((500, 4))) < 0.05


def test_cka_constant_or_mismatched_is_a_clear_error():
    with pytest.raises(InvarianceError, match="constant"):
        linear_cka(np.ones((10, 3)), np.random.default_rng(0).standard_normal((10, 3)))
    with pytest.raises(InvarianceError, match="same number"):
        linear_cka(np.zeros((10, 3)), np.zeros((9, 3)))
