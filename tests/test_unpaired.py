"""Unpaired domains: the two-sample forms of the measures, their calibration and power."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from invariance.errors import InvarianceError
from invariance.metrics.domain import unpaired_domain_classifier
from invariance.metrics.mmd import unpaired_permutation_test
from invariance.metrics.probe import unpaired_probes
from invariance.options import ScoringOptions
from invariance.scoring import score_unpaired_features

from nulls import rejection_band
from test_grouped_splits import ALPHA


def episodes(n_episodes, frames, d, rng, *, shift=0.0, episode_sd=1.0, frame_sd=0.3):
    """One domain's frames: an episode component shared by its frames plus frame noise."""
    centre = episode_sd * rng.standard_normal((n_episodes, 1, d))
    x = centre + frame_sd * rng.standard_normal((n_episodes, frames, d))
    x[:, :, : d // 4] += shift
    return x.reshape(-1, d), np.repeat(np.arange(n_episodes), frames)


def _gretton_lemma6(X, Y, bandwidth):
    # Gretton, Borgwardt, Rasch, Schoelkopf & Smola, JMLR 13 (2012), Lemma 6: the unbiased
    # MMD^2_u, written out with scipy's distances and explicit double sums.
    k = lambda A, B: np.exp(-cdist(A, B, "sqeuclidean") / (2 * bandwidth**2))  # noqa: E731
    m, n = len(X), len(Y)
    kxx, kyy = k(X, X), k(Y, Y)
    return ((kxx.sum() - np.trace(kxx)) / (m * (m - 1)) + (kyy.sum() - np.trace(kyy)) / (n * (n - 1))
            - 2 * k(X, Y).mean())


def test_unpaired_mmd_statistic_is_gretton_lemma_6():
    rng = np.random.default_rng(0)
    a, b = rng.standard_normal((37, 5)), rng.standard_normal((23, 5)) + 0.4
    out = unpaired_permutation_test(a, b, permutations=50)
    assert out["mmd2"] == pytest.approx(_gretton_lemma6(a, b, out["bandwidth"]), rel=1e-9)
    # the median heuristic over the pooled sample (Gretton et al. 2012, section 8)
    pooled = np.vstack([a, b])
    assert out["bandwidth"] == pytest.approx(np.median(cdist(pooled, pooled)[np.triu_indices(60, 1)]))


def test_unpaired_permutations_move_whole_groups():
    # With two groups per domain, only C(4, 2) = 6 labellings exist: the p-value can only
    # take values (b + 1) / (B + 1) with b counting the ~B/6 * k draws that tie or exceed.
    rng = np.random.default_rng(1)
    a, ga = episodes(2, 10, 4, rng)
    b, gb = episodes(2, 10, 4, rng, shift=3.0)
    out = unpaired_permutation_test(a, b, groups_a=ga, groups_b=gb, permutations=600, seed=0)
    # the observed labelling (and its mirror) are 2 of the 6: p about 1/3, never tiny
    assert out["p_value"] > 0.2
    assert out["grouping"] == {"unit": "group", "groups": [2, 2]}
    frame_level = unpaired_permutation_test(a, b, permutations=600, seed=0)
    assert frame_level["p_value"] < 0.01


def _unpaired_rejections(grouped, reps, seed):
    rng = np.random.default_rng(seed)
    hits = {"domain": 0, "mmd": 0}
    for _ in range(reps):
        a, ga = episodes(12, 8, 8, rng)
        b, gb = episodes(10, 8, 8, rng)
        kw = {"groups_a": ga, "groups_b": gb} if grouped else {}
        s = int(rng.integers(1_000_000))
        hits["domain"] += unpaired_domain_classifier(a, b, permutations=99, seed=s, **kw)["p_value"] <= ALPHA
        hits["mmd"] += unpaired_permutation_test(a, b, permutations=99, seed=s, **kw)["p_value"] <= ALPHA
    return {k: v / reps for k, v in hits.items()}


@pytest.mark.slow
def test_unpaired_tests_are_calibrated_by_group_and_inflated_by_frame():
    # Same acceptance as the paired case: >= 100 null repetitions, rejection rate at 0.05
    # inside the exact binomial 99% band (scipy.stats.binom); frame-level permutations of
    # episode-correlated frames reject above it.
    reps = 100
    low, high = rejection_band(reps, ALPHA)
    grouped = _unpaired_rejections(True, reps, seed=2)
    frames = _unpaired_rejections(False, reps, seed=2)
    for name in ("domain", "mmd"):
        assert low <= grouped[name] <= high, (name, grouped[name], (low, high))
        assert frames[name] > high, (name, frames[name], high)


def test_unpaired_power_under_a_clutter_shift():
    rng = np.random.default_rng(4)
    found = 0
    for _ in range(10):
        a, ga = episodes(16, 8, 8, rng, episode_sd=0.3)
        b, gb = episodes(14, 8, 8, rng, episode_sd=0.3, shift=0.8)
        dc = unpaired_domain_classifier(a, b, groups_a=ga, groups_b=gb, permutations=99)
        mmd = unpaired_permutation_test(a, b, groups_a=ga, groups_b=gb, permutations=99)
        found += dc["p_value"] < 0.05 and mmd["p_value"] < 0.05
        assert dc["accuracy"] > 0.6
    assert found >= 9


def test_balanced_accuracy_keeps_chance_at_one_half_with_unequal_sizes():
    rng = np.random.default_rng(5)
    accs = [unpaired_domain_classifier(rng.standard_normal((150, 6)), rng.standard_normal((40, 6)),
                                       permutations=0)["accuracy"] for _ in range(20)]
    # balanced accuracy: the mean of the two domains' accuracies (common practice), so a
    # classifier that leans to the larger domain gains nothing; plain accuracy would sit near 0.79
    assert abs(np.mean(accs) - 0.5) < 0.05


def test_unpaired_probe_trains_on_a_and_scores_held_out_a_and_b():
    rng = np.random.default_rng(6)
    a, ga = episodes(20, 6, 8, rng)
    b, gb = episodes(30, 6, 8, rng)
    w = np.ones(8)
    ya, yb = a @ w, (b * np.r_[np.zeros(4), np.ones(4)]) @ w  # in B half the useful dimensions are lost
    out = unpaired_probes(a, b, {"y": ya}, {"y": yb}, groups_a=ga, groups_b=gb)["y"]
    assert out["clean"] > 0.99 and out["cluttered"] < out["clean"] - 0.05
    assert out["gap_ci"][0] > 0 and out["n_test_b"] == b.shape[0] and out["trained_on"] == "A"
    # GroupShuffleSplit(test_size=0.3) on 20 episodes holds out 6 whole episodes
    assert out["n_test"] == 36


def test_unpaired_result_leaves_out_paired_measures_with_reasons():
    rng = np.random.default_rng(7)
    a, ga = episodes(12, 5, 8, rng, episode_sd=0.3)
    b, gb = episodes(12, 5, 8, rng, episode_sd=0.3, shift=1.5)
    out = score_unpaired_features(a, b, groups_a=ga, groups_b=gb, options=ScoringOptions(permutations=50))
    assert set(out["metrics"]) == {"domain_classifier", "mmd"}
    assert {"paired_drift", "pair_retrieval_top1", "cka"} <= set(out["not_computed"])
    assert all(isinstance(v, str) and v for v in out["not_computed"].values())
    assert out["pairing"] == "unpaired" and out["grouping"]["groups"] == [12, 12]
    assert out["metrics"]["mmd"]["p_value"] < 0.05


def test_too_few_groups_in_a_domain_is_a_clear_error():
    rng = np.random.default_rng(8)
    a, ga = episodes(3, 10, 4, rng)
    b, gb = episodes(8, 10, 4, rng)
    with pytest.raises(InvarianceError, match="domain A has 30 rows in 3 groups"):
        score_unpaired_features(a, b, groups_a=ga, groups_b=gb)


def test_unpaired_classifier_with_fixed_C_matches_scikit_learn_ridge_on_the_same_folds():
    # Reference: scikit-learn's StandardScaler + Ridge(alpha = 4 / C) refitted on each
    # fold's training rows with +-1 domain labels; a held-out row is called B when its
    # prediction is above the midpoint of the training classes' mean predictions (the
    # intercept cancels). The balanced accuracy must be the same.
    from sklearn.linear_model import Ridge
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    from invariance.metrics.domain import sample_groups, stratified_group_folds

    rng = np.random.default_rng(9)
    a, ga = episodes(10, 4, 5, rng, episode_sd=0.5)
    b, gb = episodes(8, 4, 5, rng, episode_sd=0.5, shift=0.7)
    ours = unpaired_domain_classifier(a, b, groups_a=ga, groups_b=gb, Cs=[0.1], permutations=0, seed=3)
    codes = sample_groups(ga, gb, len(a), len(b))
    is_b = np.r_[np.zeros(len(a), bool), np.ones(len(b), bool)]
    dom = np.zeros(codes.max() + 1)
    dom[codes[is_b]] = 1
    fold = stratified_group_folds(codes, dom, 5, 3)[codes]
    X, y = np.vstack([a, b]), np.where(is_b, 1.0, -1.0)
    called_b = np.zeros(len(X), bool)
    for k in range(5):
        tr, te = fold != k, fold == k
        model = make_pipeline(StandardScaler(), Ridge(alpha=4 / 0.1)).fit(X[tr], y[tr])
        fitted = model.predict(X[tr])
        cut = 0.5 * (fitted[y[tr] > 0].mean() + fitted[y[tr] < 0].mean())
        called_b[te] = model.predict(X[te]) > cut
    correct = called_b == is_b
    assert ours["accuracy"] == pytest.approx((correct[~is_b].mean() + correct[is_b].mean()) / 2, abs=1e-12)
    assert not set(codes[fold == 0]) & set(codes[fold != 0])  # groups never straddle folds
