"""Domain classifier: grouped folds, exact interval, proxy A-distance, null calibration."""

import numpy as np
import pytest
from scipy.stats import beta, binom
from sklearn.model_selection import cross_val_score

from conftest import paired_gaussians
from invariance.errors import InvarianceError
from invariance.metrics.domain import (
    DEFAULT_CS,
    domain_classifier,
    make_domain_estimator,
    paired_folds,
)


def _paired(n, d, seed, shift=0.0, noise=1.0):
    return paired_gaussians(n, d, seed, shift, noise)


def test_accuracy_equals_cross_val_score_on_the_same_folds():
    # Reference: scikit-learn cross_val_score with the same estimator and folds; the
    # pooled held-out accuracy is the fold accuracies weighted by fold size.
    x, y = _paired(60, 8, seed=0, shift=0.3)
    result = domain_classifier(x, y, folds=5, seed=3)
    X = np.vstack([x, y])
    labels = np.r_[np.zeros(60), np.ones(60)]
    splits = paired_folds(60, 5, seed=3)
    scores = cross_val_score(make_domain_estimator(DEFAULT_CS, seed=3), X, labels, cv=splits)
    sizes = np.array([len(test) for _, test in splits])
    assert result["accuracy"] == pytest.approx((scores * sizes).sum() / sizes.sum(), abs=1e-12)


def test_fixed_C_equals_cross_val_score():
    x, y = _paired(40, 5, seed=1, shift=0.5)
    result = domain_classifier(x, y, folds=4, seed=0, Cs=[0.1])
    splits = paired_folds(40, 4, seed=0)
    X, labels = np.vstack([x, y]), np.r_[np.zeros(40), np.ones(40)]
    scores = cross_val_score(make_domain_estimator((0.1,)), X, labels, cv=splits)
    assert result["accuracy"] == pytest.approx(scores.mean(), abs=1e-12)  # equal fold sizes
    assert result["C"] == [0.1] * 4


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


def test_interval_p_value_and_proxy_a_distance_follow_their_formulas():
    x, y = _paired(50, 6, seed=2, shift=0.4)
    r = domain_classifier(x, y, seed=1)
    n_test = r["n_test"]
    k = round(r["accuracy"] * n_test)
    # Clopper & Pearson, Biometrika 1934: beta quantiles of the exact binomial interval
    assert r["ci"][0] == pytest.approx(beta.ppf(0.025, k, n_test - k + 1), rel=1e-6)
    assert r["ci"][1] == pytest.approx(beta.ppf(0.975, k + 1, n_test - k), rel=1e-6)
    # Lopez-Paz & Oquab, ICLR 2017, sec. 3: P(Binomial(n_te, 1/2) >= correct)
    assert r["p_value"] == pytest.approx(binom.sf(k - 1, n_test, 0.5), rel=1e-9)
    # Ben-David et al., NIPS 2006 (Ganin et al., JMLR 2016, eq. 3): 2 (1 - 2 err)
    assert r["proxy_a_distance"] == pytest.approx(2 * (1 - 2 * (1 - r["accuracy"])))


def test_below_chance_accuracy_has_zero_proxy_a_distance():
    # d_A is a supremum over a hypothesis class closed under complement (Ben-David et al.,
    # NIPS 2006), so a held-out error above 1/2 gives distance 0, never a negative one.
    for seed in range(6):
        r = domain_classifier(*_paired(30, 4, seed=300 + seed), seed=seed, Cs=[0.1])
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


def test_separable_domains_reach_accuracy_one_and_distance_two():
    x, y = _paired(40, 5, seed=4, shift=5.0, noise=0.1)
    r = domain_classifier(x, y)
    assert r["accuracy"] == 1.0 and r["proxy_a_distance"] == 2.0
    assert r["p_value"] < 1e-20


def test_null_interval_coverage():
    # Null calibration (docs/design.md, statistics rules): both domains from one distribution, 100 seeded
    # repetitions; the 95% Clopper-Pearson interval must cover 0.5 in >= 85% of them.
    # Fixed C and 3 folds keep this fast; held-out predictions are valid for any C.
    reps = 100
    covered = rejected = 0
    for seed in range(reps):
        x, y = _paired(40, 5, seed=500 + seed)
        r = domain_classifier(x, y, folds=3, seed=seed, Cs=[0.1])
        covered += r["ci"][0] <= 0.5 <= r["ci"][1]
        rejected += r["p_value"] <= 0.05
    assert covered / reps >= 0.85
    assert rejected / reps <= 0.10


def test_power_under_moderate_shift():
    # A moderate shift (0.8 in each of 5 coordinates of sd sqrt(2), about 0.57 sd, a
    # medium effect size; common practice) must give p <= 0.05 in >= 95% of repetitions.
    reps = 40
    detected = sum(
        domain_classifier(*_paired(40, 5, seed=900 + s, shift=0.8), folds=3, seed=s, Cs=[0.1])[
            "p_value"
        ]
        <= 0.05
        for s in range(reps)
    )
    assert detected / reps >= 0.95


def test_many_features_few_pairs_do_not_fake_separation():
    # d >> n under the null: the inner grouped search for C must not leak into the
    # held-out accuracy (an overfitted classifier would still score ~0.5 held out;
    # a leaking one would not).
    accuracies, rejected = [], 0
    for seed in range(8):
        x, y = _paired(30, 600, seed=700 + seed)
        r = domain_classifier(x, y, seed=seed)
        accuracies.append(r["accuracy"])
        rejected += r["p_value"] <= 0.05
    assert 0.4 <= np.mean(accuracies) <= 0.6
    assert rejected <= 2


def test_small_sample_note():
    x, y = _paired(50, 3, seed=5)
    r = domain_classifier(x, y, Cs=[1.0])
    assert r["small_sample"] is True and "Rabanser" in r["note"]
    x, y = _paired(101, 3, seed=5)
    assert "small_sample" not in domain_classifier(x, y, Cs=[1.0])


def test_too_few_pairs_names_the_minimum():
    x, y = _paired(9, 3, seed=6)
    with pytest.raises(InvarianceError, match="at least 10 pairs"):
        domain_classifier(x, y, folds=5)


@pytest.mark.parametrize(
    "kwargs, match", [({"folds": 1}, "folds"), ({"Cs": [0.0]}, "Cs"), ({"seed": 1.5}, "seed")]
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
    assert a["accuracy"] == b["accuracy"] and np.array_equal(a["decision"], b["decision"])


def test_subsample_above_max_pairs_is_seeded_and_reported():
    x, y = _paired(60, 4, seed=10, shift=0.3)
    r = domain_classifier(x, y, seed=2, Cs=[0.1], max_pairs=20)
    assert r["method"] == "subsample of 20 pairs" and r["pairs_used"] == 20
    assert r["n_test"] == 40
    keep = np.sort(np.random.default_rng([2, 1]).choice(60, 20, replace=False))
    alone = domain_classifier(x[keep], y[keep], seed=2, Cs=[0.1])
    assert alone["method"] == "exact"
    assert r["accuracy"] == alone["accuracy"]
    np.testing.assert_array_equal(r["decision"], alone["decision"])
