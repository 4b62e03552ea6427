"""Domain classifier: ridge reference, exact permutation test, interval, null calibration, power."""

import numpy as np
import pytest
from scipy.stats import binom, bootstrap, norm
from sklearn.linear_model import Ridge, RidgeClassifier
from sklearn.model_selection import cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from conftest import paired_gaussians
from invariance.errors import InvarianceError
from invariance.metrics import domain
from invariance.metrics.domain import DEFAULT_CS, domain_classifier, paired_folds
from nulls import null, shifted


def _paired(n, d, seed, shift=0.0, noise=1.0):
    return paired_gaussians(n, d, seed, shift, noise)


def _ridge(C):
    # the logistic loss's second-order expansion at 0 gives ridge penalty 4 / C
    return make_pipeline(StandardScaler(), RidgeClassifier(alpha=4.0 / C))


def _held_out(model_for_fold, x, y, folds, seed):
    n = len(x)
    X, labels = np.vstack([x, y]), np.r_[np.zeros(n), np.ones(n)]
    decision = np.empty(2 * n)
    for f, (train, test) in enumerate(paired_folds(n, folds, seed=seed)):
        decision[test] = model_for_fold(f).fit(X[train], labels[train]).decision_function(X[test])
    return decision.reshape(2, -1).T


@pytest.mark.parametrize("n, d", [(40, 6), (20, 300)])  # primal and dual (d > 2n) forms
def test_fixed_C_equals_scikit_learn_ridge_classifier(n, d):
    # Reference: scikit-learn's StandardScaler + RidgeClassifier (+-1 targets, centred
    # intercept) refitted on each fold, and cross_val_score on the same folds.
    x, y = _paired(n, d, seed=1, shift=0.3)
    r = domain_classifier(x, y, folds=4, seed=0, Cs=[0.1], permutations=0)
    np.testing.assert_allclose(r["decision"], _held_out(lambda f: _ridge(0.1), x, y, 4, 0), atol=1e-9)
    X, labels = np.vstack([x, y]), np.r_[np.zeros(n), np.ones(n)]
    scores = cross_val_score(_ridge(0.1), X, labels, cv=paired_folds(n, 4, seed=0))
    assert r["accuracy"] == pytest.approx(scores.mean(), abs=1e-12)  # equal fold sizes
    assert r["C"] == [0.1] * 4


def _pair_deletion_by_refit(Z, labels, alpha):
    # Leave-one-pair-out squared error by refitting scikit-learn's Ridge without each pair
    # (rows i and m + i of the standardised training fold), the quantity the closed form
    # (I - H_bb)^-1 r_b gives (reference: scikit-learn Ridge refits).
    m = len(Z) // 2
    total = 0.0
    for i in range(m):
        out = [i, m + i]
        keep = np.setdiff1d(np.arange(2 * m), out)
        fit = Ridge(alpha=alpha).fit(Z[keep], labels[keep])
        total += np.sum((labels[out] - fit.predict(Z[out])) ** 2)
    return total


def test_inner_search_picks_the_least_pair_deletion_error_and_the_fit_uses_it():
    x, y = _paired(30, 8, seed=2, shift=0.25)
    r = domain_classifier(x, y, folds=5, seed=3, permutations=0)
    X = np.vstack([x, y])
    for f, (train, _) in enumerate(paired_folds(30, 5, seed=3)):
        Z = StandardScaler().fit_transform(X[train])
        m = len(train) // 2
        labels = np.r_[-np.ones(m), np.ones(m)]
        errors = [_pair_deletion_by_refit(Z, labels, 4.0 / c) for c in DEFAULT_CS]
        assert r["C"][f] == DEFAULT_CS[int(np.argmin(errors))]
    np.testing.assert_allclose(r["decision"], _held_out(lambda f: _ridge(r["C"][f]), x, y, 5, 3), atol=1e-9)


def test_pair_deletion_closed_form_equals_refits():
    rng = np.random.default_rng(3)
    Z = rng.standard_normal((24, 5))
    Z -= Z.mean(axis=0)
    U, S, _ = domain._basis(Z)
    signs = np.c_[np.ones(12), rng.choice([-1.0, 1.0], 12)]
    M = (U[12:] - U[:12]).T @ signs
    closed = domain._pair_deletion_error(U, S, M, signs, 3.0)
    for col in range(2):
        labels = np.r_[-signs[:, col], signs[:, col]]
        assert closed[col] == pytest.approx(_pair_deletion_by_refit(Z, labels, 3.0), rel=1e-9)


def test_folds_keep_both_images_of_a_scene_together():
    n = 23
    splits = paired_folds(n, 5, seed=7)
    held = np.concatenate([test[test < n] for _, test in splits])
    assert np.array_equal(np.sort(held), np.arange(n))  # every pair held out exactly once
    for train, test in splits:
        assert not set(train % n) & set(test % n)
        m = len(train) // 2
        assert np.array_equal(train[:m] + n, train[m:])  # stacked [clean; cluttered]
        assert np.array_equal(np.sort(test[test >= n] - n), np.sort(test[test < n]))


def _gap_statistic(decision, n, folds, seed):
    # per fold: sum of the cluttered-minus-clean gaps over their root mean square
    total = 0.0
    for _, test in paired_folds(n, folds, seed=seed):
        gap = decision[test[test < n], 1] - decision[test[test < n], 0]
        total += gap.sum() / np.sqrt(np.mean(gap**2))
    return total


def test_permuted_statistics_are_refits_on_swapped_views():
    # Ojala & Garriga, JMLR 2010, test 1: the whole cross-validated statistic recomputed on
    # data with labels permuted (here: views swapped within pairs), p = (b + 1) / (B + 1).
    n, B, seed = 30, 20, 5
    x, y = _paired(n, 4, seed=4, shift=0.2)
    r = domain_classifier(x, y, seed=seed, permutations=B)
    signs = domain._sign_matrix(n, B, seed)
    acc, paired = [], []
    for col in signs.T:
        swap = (col < 0)[:, None]
        again = domain_classifier(np.where(swap, y, x), np.where(swap, x, y), seed=seed, permutations=0)
        acc.append(again["accuracy"])
        paired.append(_gap_statistic(again["decision"], n, 5, seed))
    assert acc[0] == r["accuracy"]
    assert r["p_value_accuracy"] == pytest.approx((1 + np.sum(np.array(acc[1:]) >= acc[0])) / (B + 1))
    assert r["p_value_paired"] == pytest.approx((1 + np.sum(np.array(paired[1:]) >= paired[0])) / (B + 1))
    assert r["p_value"] == r["p_value_paired"] and r["permutations"] == B


def test_bootstrap_interval_matches_scipy_percentile_bootstrap():
    # Reference: scipy.stats.bootstrap, percentile method, resampling pairs' correctness;
    # the two Monte Carlo runs agree to within a few thousandths at 2000 resamples.
    x, y = _paired(80, 6, seed=5, shift=0.3)
    r = domain_classifier(x, y, permutations=0)
    dec = r["decision"]
    per_pair = ((dec[:, 0] <= 0).astype(float) + (dec[:, 1] > 0)) / 2
    ref = bootstrap((per_pair,), np.mean, method="percentile", n_resamples=2000, random_state=0)
    assert r["ci"] == pytest.approx([ref.confidence_interval.low, ref.confidence_interval.high], abs=0.015)
    tested = domain_classifier(x, y, permutations=200)
    # the permutation inversion only widens it (the union of both intervals)
    assert tested["ci"][0] <= r["ci"][0] and tested["ci"][1] >= r["ci"][1]
    assert "permutation" in tested["ci_method"] and "bootstrap" in r["ci_method"]


def test_proxy_a_distance_and_paired_accuracy_follow_their_formulas():
    x, y = _paired(50, 6, seed=2, shift=0.4)
    r = domain_classifier(x, y, seed=1, permutations=0)
    dec = r["decision"]
    # Ben-David et al., NIPS 2006 (Ganin et al., JMLR 2016, eq. 3): 2 (1 - 2 err)
    assert r["proxy_a_distance"] == pytest.approx(2 * (1 - 2 * (1 - r["accuracy"])))
    # share of pairs whose cluttered image scores higher, ties counting one half (common practice)
    gap = dec[:, 1] - dec[:, 0]
    assert r["paired_accuracy"] == pytest.approx(np.mean(gap > 0) + 0.5 * np.mean(gap == 0))


def test_below_chance_accuracy_has_zero_proxy_a_distance():
    # d_A is a supremum over a hypothesis class closed under complement (Ben-David et al.,
    # NIPS 2006), so a held-out error above 1/2 gives distance 0, never a negative one.
    for seed in range(6):
        r = domain_classifier(*_paired(30, 4, seed=300 + seed), seed=seed, Cs=[0.1], permutations=0)
        if r["accuracy"] < 0.5:
            assert r["proxy_a_distance"] == 0.0
            return
    pytest.fail("no below-chance run among the seeds")


def test_decision_values_are_the_held_out_predictions():
    x, y = _paired(30, 4, seed=3, shift=0.6)
    r = domain_classifier(x, y)
    dec = r["decision"]
    assert dec.shape == (30, 2)
    correct = (dec[:, 0] <= 0).sum() + (dec[:, 1] > 0).sum()
    assert correct / 60 == pytest.approx(r["accuracy"])


def test_separable_domains_reach_accuracy_one_and_the_smallest_p_value():
    x, y = _paired(40, 5, seed=4, shift=5.0, noise=0.1)
    r = domain_classifier(x, y, permutations=99)
    assert r["accuracy"] == 1.0 and r["proxy_a_distance"] == 2.0 and r["paired_accuracy"] == 1.0
    assert r["p_value"] == r["p_value_accuracy"] == pytest.approx(1 / 100)  # no swap beats it


def test_identical_views_are_chance_with_p_one():
    x, _ = _paired(40, 5, seed=4)
    r = domain_classifier(x, x.copy(), permutations=50)
    assert r["accuracy"] == 0.5 and r["paired_accuracy"] == 0.5
    assert r["p_value"] == 1.0 and r["p_value_accuracy"] == 1.0


# Null calibration subset of tests/benchmarks/bench_calibration.py (which runs all 4 nulls x
# n in {60, 120, 400} x d in {16, 128, 512} with 200 runs); the band is the binomial 99%
# band around 5% for 200 runs (scipy.stats.binom), the coverage bound the 93%.
_REPS = 200


@pytest.mark.parametrize("kind, n, d", [("iid", 60, 16), ("paired_shared", 60, 128),
                                        ("heavy_tailed", 120, 16), ("relu_sparse", 60, 512)])
def test_null_rejection_rate_and_interval_coverage(kind, n, d):
    low, high = binom.ppf(0.005, _REPS, 0.05) / _REPS, binom.isf(0.005, _REPS, 0.05) / _REPS
    paired = accuracy = covered = 0
    for r in range(_REPS):
        out = domain_classifier(*null(kind, n, d, np.random.default_rng([20, r])), seed=r,
                                permutations=100)
        paired += out["p_value_paired"] <= 0.05
        accuracy += out["p_value_accuracy"] <= 0.05
        covered += out["ci"][0] <= 0.5 <= out["ci"][1]
    assert low <= paired / _REPS <= high  # the reported test: calibrated
    assert accuracy / _REPS <= high  # valid; ties make it conservative under a shared scene
    assert covered / _REPS >= 0.93


@pytest.mark.parametrize("kind", ["iid", "paired_shared"])
def test_power_under_a_shift_in_a_quarter_of_the_dimensions(kind):
    # The acceptance: 0.35 sd in a quarter of 32 dimensions at n = 120 (a Mahalanobis
    # distance of about 1, a large effect; common practice) is detected in >= 95% of runs.
    reps = 60
    detected = sum(
        domain_classifier(*shifted(kind, 120, 32, np.random.default_rng([30, r])), seed=r,
                          permutations=100)["p_value"] <= 0.05
        for r in range(reps)
    )
    assert detected / reps >= 0.95


def test_many_features_few_pairs_do_not_fake_separation():
    # d >> n under the null: the per-permutation search for C keeps the test exact, so
    # held-out accuracy stays near 0.5 and rejections stay rare.
    accuracies, rejected = [], 0
    for seed in range(8):
        r = domain_classifier(*_paired(30, 600, seed=700 + seed), seed=seed, permutations=100)
        accuracies.append(r["accuracy"])
        rejected += r["p_value"] <= 0.05
    assert 0.4 <= np.mean(accuracies) <= 0.6
    assert rejected <= 2


def test_all_zero_features_are_chance_with_a_reason_and_no_nan():
    zeros = np.zeros((30, 5))
    r = domain_classifier(zeros, zeros.copy())
    assert r["accuracy"] == 0.5 and r["p_value"] == 1.0 and "constant" in r["note"]
    assert np.isfinite(r["ci"]).all() and np.isfinite(r["decision"]).all()


def test_constant_columns_change_nothing():
    x, y = _paired(40, 4, seed=6, shift=0.4)
    pad = np.full((40, 3), 7.25)
    with_pad = domain_classifier(np.hstack([x, pad]), np.hstack([y, pad]), permutations=50)
    alone = domain_classifier(x, y, permutations=50)
    assert with_pad["accuracy"] == alone["accuracy"] and with_pad["p_value"] == alone["p_value"]
    np.testing.assert_allclose(with_pad["decision"], alone["decision"], atol=1e-9)


def test_permutations_zero_gives_the_same_accuracy_without_a_test():
    x, y = _paired(40, 6, seed=7, shift=0.3)
    bare, tested = domain_classifier(x, y, permutations=0), domain_classifier(x, y)
    assert bare["p_value"] is None and bare["p_value_accuracy"] is None
    assert bare["accuracy"] == tested["accuracy"] and bare["C"] == tested["C"]
    # the same products with more columns: equal up to rounding
    np.testing.assert_allclose(bare["decision"], tested["decision"], atol=1e-12)
    assert tested["permutations"] == 1000


def test_small_sample_note():
    x, y = _paired(50, 3, seed=5)
    r = domain_classifier(x, y, Cs=[1.0], permutations=0)
    assert r["small_sample"] is True and "Rabanser" in r["note"]
    x, y = _paired(101, 3, seed=5)
    assert "small_sample" not in domain_classifier(x, y, Cs=[1.0], permutations=0)


def test_too_few_pairs_names_the_minimum():
    x, y = _paired(9, 3, seed=6)
    with pytest.raises(InvarianceError, match="at least 10 pairs"):
        domain_classifier(x, y, folds=5)


@pytest.mark.parametrize(
    "kwargs, match",
    [({"folds": 1}, "folds"), ({"Cs": [0.0]}, "Cs"), ({"seed": 1.5}, "seed"),
     ({"permutations": 19}, r"1/\(B\+1\) = 0.05"), ({"permutations": -1}, "permutations")],
)
def test_bad_parameters_are_clear_errors(kwargs, match):
    x, y = _paired(20, 3, seed=7)
    with pytest.raises(InvarianceError, match=match):
        domain_classifier(x, y, **kwargs)


def test_bad_inputs_name_shapes_and_rows():
    x, y = _paired(20, 3, seed=8)
    with pytest.raises(InvarianceError, match=r"\(20, 3\).*\(19, 3\)"):
        domain_classifier(x, y[:19])
    y[[2, 5], 0] = np.nan
    with pytest.raises(InvarianceError, match="2 of 20 rows"):
        domain_classifier(x, y)


def test_seed_reproducible():
    x, y = _paired(30, 4, seed=9, shift=0.2)
    a, b = domain_classifier(x, y, seed=4), domain_classifier(x, y, seed=4)
    assert a["accuracy"] == b["accuracy"] and a["p_value"] == b["p_value"] and a["ci"] == b["ci"]
    np.testing.assert_array_equal(a["decision"], b["decision"])


def test_subsample_above_max_pairs_is_seeded_and_reported():
    x, y = _paired(60, 4, seed=10, shift=0.3)
    r = domain_classifier(x, y, seed=2, Cs=[0.1], max_pairs=20)
    assert r["method"] == "subsample of 20 pairs" and r["pairs_used"] == 20
    assert r["n_test"] == 40
    keep = np.sort(np.random.default_rng([2, 1]).choice(60, 20, replace=False))
    alone = domain_classifier(x[keep], y[keep], seed=2, Cs=[0.1])
    assert alone["method"] == "exact"
    assert r["accuracy"] == alone["accuracy"] and r["p_value"] == alone["p_value"]
    np.testing.assert_array_equal(r["decision"], alone["decision"])


def test_null_generators_have_their_documented_shape():
    rng = np.random.default_rng(0)
    clean, cluttered = null("relu_sparse", 4000, 8, rng)
    # P(N(0, 1 + 0.3^2) > 1), the share the module docstring states (scipy.stats.norm)
    assert np.mean(clean > 0) == pytest.approx(norm.sf(1 / np.sqrt(1.09)), abs=0.01)
    a, b = null("paired_shared", 4000, 8, rng)
    # view = scene + 0.3 noise: the two views correlate at 1 / 1.09 (common practice)
    assert np.corrcoef(a[:, 0], b[:, 0])[0, 1] == pytest.approx(1 / 1.09, abs=0.01)
    a, b = shifted("paired_shared", 4000, 8, rng, shift=0.35, fraction=0.25)
    moved = (b - a).mean(axis=0)
    assert moved[:2] == pytest.approx([0.35 * np.sqrt(1.09)] * 2, abs=0.02)  # 0.35 marginal sd
    assert np.abs(moved[2:]).max() < 0.02
