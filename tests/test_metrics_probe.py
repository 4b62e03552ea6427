"""Linear probes trained on clean pairs, scored on held-out clean and cluttered pairs."""

import json

import numpy as np
import pytest
from nulls import null
from scipy.stats import norm
from scipy.stats import t as student_t
from sklearn.datasets import load_digits
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LogisticRegression, RidgeCV
from sklearn.metrics import r2_score
from sklearn.model_selection import train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from invariance.errors import InvarianceError
from invariance.metrics import probe
from invariance.metrics.probe import PROBE_C, RIDGE_ALPHAS, linear_probes, make_probe


@pytest.fixture(scope="module")
def digits():
    """scikit-learn's bundled digits (UCI optical digits), first 400, labels as text."""
    data = load_digits()
    X = data.data[:400].astype(np.float64)
    return X, data.target[:400].astype(str).astype(object)


def test_clean_accuracy_equals_a_plain_sklearn_probe(digits):
    # Reference: scikit-learn, the same StandardScaler + LogisticRegression fitted on the
    # same stratified, seeded split of pair indices.
    X, labels = digits
    noisy = X + np.random.default_rng(0).normal(0, 4.0, X.shape)
    result = linear_probes(X, noisy, {"digit": labels}, seed=5)["digit"]
    train, test = train_test_split(
        np.arange(len(X)), test_size=0.3, random_state=5, stratify=labels.astype(str)
    )
    model = make_pipeline(StandardScaler(), LogisticRegression(C=PROBE_C, max_iter=2000))
    model.fit(X[train], labels[train].astype(str))
    assert result["clean"] == pytest.approx(model.score(X[test], labels[test].astype(str)))
    assert result["cluttered"] == pytest.approx(model.score(noisy[test], labels[test].astype(str)))
    assert result["clean"] > 0.9  # digits are linearly separable to > 90% (well known)
    assert result["gap"] == pytest.approx(result["clean"] - result["cluttered"])
    assert result["gap"] > 0.05  # heavy pixel noise must cost accuracy
    assert (result["n_train"], result["n_test"]) == (280, 120)
    assert result["kind"] == "classification" and result["metric"] == "accuracy"


def test_standard_errors_are_the_binomial_ones_for_an_accuracy(digits):
    # Reference: the standard error of a proportion, sqrt(p (1 - p) / n) (binomial
    # variance, common practice); the bootstrap's is within Monte Carlo noise of it.
    X, labels = digits
    noisy = X + np.random.default_rng(0).normal(0, 4.0, X.shape)
    blurred = X + np.random.default_rng(1).normal(0, 12.0, X.shape)
    result = linear_probes(blurred, noisy, {"digit": labels}, seed=2)["digit"]
    acc, n = result["clean"], result["n_test"]
    assert 0.3 < acc < 0.95
    assert result["clean_se"] == pytest.approx(np.sqrt(acc * (1 - acc) / n), rel=0.1)
    cluttered = result["cluttered"]
    assert 0.2 < cluttered < 0.95 and abs(cluttered - acc) > 0.05  # a second, different proportion
    assert result["cluttered_se"] == pytest.approx(np.sqrt(cluttered * (1 - cluttered) / n), rel=0.1)


def test_identical_features_have_no_gap(digits):
    X, labels = digits
    result = linear_probes(X, X.copy(), {"digit": labels})["digit"]
    assert result["gap"] == 0.0
    assert result["gap_ci"] == [0.0, 0.0]


def test_informative_classes_are_decodable_above_the_majority_baseline(digits):
    # Reference for the baseline: scikit-learn DummyClassifier("most_frequent") fitted on
    # the same training pairs and scored on the held-out ones.
    X, labels = digits
    noisy = X + np.random.default_rng(0).normal(0, 4.0, X.shape)
    result = linear_probes(X, noisy, {"digit": labels}, seed=5)["digit"]
    train, test = train_test_split(
        np.arange(len(X)), test_size=0.3, random_state=5, stratify=labels.astype(str)
    )
    dummy = DummyClassifier(strategy="most_frequent").fit(X[train], labels[train].astype(str))
    assert result["baseline"] == pytest.approx(dummy.score(X[test], labels[test].astype(str)))
    assert result["decodable"] is True and "note" not in result
    low, high = result["gap_ci"]
    assert 0.0 < low < result["gap"] < high <= 1.0  # heavy noise costs accuracy, clearly
    assert result["ci_method"].startswith("expanded percentile bootstrap over held-out pairs")


def test_classes_without_information_are_not_decodable():
    # 90/10 labels independent of the features: accuracy near 0.9 is the majority rate,
    # not information. The decodability check has one-sided level 2.5%, and the
    # benchmark measured 0 of 1,000 such runs read decodable; ten seeds must all read not.
    rng = np.random.default_rng(6)
    for seed in range(10):
        X = rng.standard_normal((200, 20))
        labels = np.where(rng.random(200) < 0.9, "common", "rare").astype(object)
        result = linear_probes(X, X + 0.3 * rng.standard_normal(X.shape), {"y": labels}, seed=seed)["y"]
        assert result["baseline"] > 0.8
        assert result["decodable"] is False
        assert result["note"] == "not decodable on clean"


def test_regression_baseline_is_the_training_mean_r2():
    # Reference: scikit-learn DummyRegressor("mean") and r2_score on the same split; R^2 of
    # a constant is <= 0 on other pairs.
    rng = np.random.default_rng(7)
    X = rng.standard_normal((200, 10))
    target = X @ rng.standard_normal(10) + 0.5 * rng.standard_normal(200)
    noise = rng.standard_normal(200)
    result = linear_probes(X, X + rng.standard_normal(X.shape), {"t": target, "noise": noise}, seed=3)
    train, test = train_test_split(np.arange(200), test_size=0.3, random_state=3)
    dummy = DummyRegressor(strategy="mean").fit(X[train], target[train])
    assert result["t"]["baseline"] == pytest.approx(r2_score(target[test], dummy.predict(X[test])))
    assert result["t"]["baseline"] <= 0.0
    assert result["t"]["decodable"] is True
    assert result["noise"]["decodable"] is False
    assert "symmetric" in result["t"]["ci_method"]
    low, high = result["t"]["gap_ci"]
    assert high - result["t"]["gap"] == pytest.approx(result["t"]["gap"] - low)


def test_seed_determines_every_output():
    rng = np.random.default_rng(8)
    X = rng.standard_normal((120, 6))
    noisy = X + rng.standard_normal(X.shape)
    tasks = {"side": np.where(X[:, 0] > 0, "l", "r").astype(object), "size": X[:, 1] + 0.0}
    first = linear_probes(X, noisy, tasks, seed=4)
    assert linear_probes(X, noisy, tasks, seed=4) == first
    assert json.loads(json.dumps(first, allow_nan=False)) == first
    other = linear_probes(X, noisy, tasks, seed=9)
    assert other["size"]["gap_ci"] != first["size"]["gap_ci"]


def test_expanded_levels_follow_the_t_interval_width():
    # Hesterberg, The American Statistician 69 (2015), expanded percentile interval: the
    # percentile level alpha' with Phi^-1(1 - alpha') = sqrt(m / (m - 1)) t_{m-1, 0.975}
    # (formula from memory); it tends to the plain 2.5 / 97.5 as m grows.
    for m in (5, 18, 120):
        alpha = norm.cdf(-np.sqrt(m / (m - 1)) * student_t.ppf(0.975, m - 1))
        assert probe._expanded_levels(m) == pytest.approx((100 * alpha, 100 * (1 - alpha)))
    assert probe._expanded_levels(18)[0] < 2.0
    assert probe._expanded_levels(10_000)[0] == pytest.approx(2.5, abs=0.01)


def _null_labels(kind, clean, cluttered, rng):
    """A label that sees the scene through the mean of both views, which keeps the null."""
    signal = 0.5 * (clean[:, 0] + cluttered[:, 0])
    if kind == "classification":
        return np.where(signal > 0, "a", "b")
    return signal + 0.5 * rng.standard_normal(signal.size)


@pytest.mark.parametrize(
    "kind, family, bound",
    [("classification", "paired_shared", 0.93), ("regression", "paired_shared", 0.93),
     ("regression", "heavy_tailed", 0.93)],
)
def test_gap_interval_covers_zero_under_a_paired_null(kind, family, bound):
    # Views exchangeable within pairs (tests/nulls.py), so for a probe fitted on other
    # pairs the clean and cluttered scores have the same distribution: the true gap is 0.
    # One probe, 600 fresh sets of 18 held-out pairs; reduced check of
    # tests/benchmarks/bench_coverage.py, which refits per run. Binomial standard error
    # at 95% and 600 runs: 0.9 points.
    rng = np.random.default_rng(10)
    clean, cluttered = null(family, 200, 16, rng)
    y_train = _null_labels(kind, clean, cluttered, rng)
    model = make_probe(kind).fit(clean, y_train)
    runs, m = 600, 18
    clean, cluttered = null(family, runs * m, 16, rng)
    y_all = _null_labels(kind, clean, cluttered, rng)
    on_clean, on_cluttered = model.predict(clean), model.predict(cluttered)
    baseline = np.full(m, probe._constant_prediction(y_train, kind))
    hits = []
    for rep in range(runs):
        rows = slice(rep * m, (rep + 1) * m)
        y = y_all[rows]
        preds = {"clean": on_clean[rows], "cluttered": on_cluttered[rows], "baseline": baseline}
        point = {name: probe._score(kind, y, p) for name, p in preds.items()}
        low, high = probe._bootstrap(kind, y, preds, point, rep, 1000)[0]
        hits.append(low <= 0.0 <= high)
    assert np.mean(hits) >= bound


def test_regression_probe_is_ridge_r2():
    # Reference: scikit-learn RidgeCV and r2_score on the same split.
    rng = np.random.default_rng(1)
    X = rng.standard_normal((200, 10))
    target = X @ rng.standard_normal(10)
    cluttered = X + rng.normal(0, 1.0, X.shape)
    result = linear_probes(X, cluttered, {"size": target}, seed=2)["size"]
    train, test = train_test_split(np.arange(200), test_size=0.3, random_state=2)
    model = make_pipeline(StandardScaler(), RidgeCV(alphas=RIDGE_ALPHAS))
    model.fit(X[train], target[train])
    assert result["clean"] == pytest.approx(r2_score(target[test], model.predict(X[test])))
    assert result["clean"] > 0.99 and result["gap"] > 0.1
    assert result["kind"] == "regression" and result["metric"] == "r2"


def test_split_is_stratified_and_over_pairs(digits):
    X, labels = digits
    result = linear_probes(X, X, {"digit": labels}, test_fraction=0.25)["digit"]
    assert result["n_train"] + result["n_test"] == 400
    assert result["n_test"] == 100


def test_missing_labels_are_left_out():
    rng = np.random.default_rng(3)
    X = rng.standard_normal((60, 4))
    target = X[:, 0].copy()
    target[:10] = np.nan
    result = linear_probes(X, X, {"t": target})["t"]
    assert result["n_train"] + result["n_test"] == 50


@pytest.mark.parametrize(
    "labels, match",
    [
        (np.array(["a"] * 40, dtype=object), "one class"),
        (np.full(40, 3.0), "constant"),
        (np.array(["a"] * 5 + [""] * 35, dtype=object), "only 5 labelled pairs; need 10"),
        (np.array(["a"] * 39 + ["b"], dtype=object), "too rare"),
    ],
)
def test_unprobeable_labels_are_not_computable(labels, match):
    X = np.random.default_rng(4).standard_normal((40, 3))
    result = linear_probes(X, X + 1, {"label": labels})
    assert match in result["label"]["not_computable"]
    json.dumps(result, allow_nan=False)


def test_rare_class_falls_back_to_an_unstratified_split():
    rng = np.random.default_rng(5)
    X = rng.standard_normal((60, 3))
    labels = np.array(["a"] * 30 + ["b"] * 29 + ["c"], dtype=object)
    result = linear_probes(X, X, {"label": labels})["label"]
    assert "not stratified" in result["note"]
    assert np.isfinite(result["clean"])


def test_wrong_label_length_is_a_clear_error():
    X = np.zeros((20, 3))
    with pytest.raises(InvarianceError, match="one value per pair"):
        linear_probes(X, X, {"label": np.zeros(19)})


@pytest.mark.parametrize("fraction", [0.0, 1.0, "a"])
def test_bad_test_fraction(fraction):
    X = np.zeros((20, 3))
    with pytest.raises(InvarianceError, match="test_fraction"):
        linear_probes(X, X, {}, test_fraction=fraction)


# ----------------------------------------------------------------------- unpaired: B's own interval

def _unpaired_classes(rng, n_a, n_b, groups_b=None, flip_b=None):
    """Two classes read off the first of 6 dimensions; ``flip_b`` marks rows of B whose label is the other one."""
    a, b = rng.standard_normal((n_a, 6)), rng.standard_normal((n_b, 6))
    ya = np.where(a[:, 0] > 0, "nut", "bolt")
    yb = np.where((b[:, 0] > 0) ^ (flip_b if flip_b is not None else False), "nut", "bolt")
    return probe.unpaired_probes(a, b, {"part": ya}, {"part": yb}, groups_b=groups_b)["part"]


def test_unpaired_b_score_interval_counts_the_rows_of_b_not_the_held_out_rows_of_a():
    # Every row of B is its own group: B's score interval contains the exact Clopper-Pearson
    # interval of B's correct rows out of B's 240 (Clopper & Pearson, Biometrika 26, 1934;
    # scipy.stats.binomtest), and is about as wide, not as wide as that interval over A's
    # 18 held-out rows, the count the verdict used before.
    from scipy.stats import binomtest

    out = _unpaired_classes(np.random.default_rng(11), 60, 240)
    assert out["n_test_b"] == 240 and out["n_test"] == 18  # GroupShuffleSplit(test_size=0.3) of 60 rows
    correct = out["cluttered"] * 240
    assert correct == pytest.approx(round(correct), abs=1e-9)
    exact = binomtest(round(correct), 240).proportion_ci(0.95, method="exact")
    low, high = out["cluttered_ci"]
    assert low <= exact.low and high >= exact.high
    assert high - low < 1.25 * (exact.high - exact.low)
    over_a = binomtest(round(out["cluttered"] * 18), 18).proportion_ci(0.95, method="exact")
    assert high - low < 0.5 * (over_a.high - over_a.low)
    assert "Clopper-Pearson interval over B's 240 rows" in out["cluttered_ci_method"]


def test_unpaired_b_score_interval_resamples_whole_episodes_of_b():
    # 12 episodes of 20 rows; in half of them the label is the other class, so the probe is
    # right on whole episodes or wrong on whole episodes (accuracy about 0.5). The rows are
    # then not independent draws: the cluster bootstrap over 12 episodes (Davison & Hinkley
    # 1997, section 3.8) must be far wider than the binomial interval over 240 rows.
    from scipy.stats import binomtest

    groups = np.repeat(np.arange(12), 20)
    out = _unpaired_classes(np.random.default_rng(12), 60, 240, groups_b=groups, flip_b=groups % 2 == 1)
    exact = binomtest(round(out["cluttered"] * 240), 240).proportion_ci(0.95, method="exact")
    low, high = out["cluttered_ci"]
    assert 0.35 < out["cluttered"] < 0.65
    assert high - low > 2.5 * (exact.high - exact.low)
    assert "over the 12 groups of B" in out["cluttered_ci_method"]


def test_unpaired_r2_interval_of_b_is_centred_on_its_score():
    # As the R^2 gap's (see _interval): the same width, centred on the estimate.
    rng = np.random.default_rng(13)
    a, b = rng.standard_normal((60, 6)), rng.standard_normal((80, 6))
    out = probe.unpaired_probes(a, b, {"x": a[:, 0] + 0.5 * rng.standard_normal(60)},
                                {"x": b[:, 0] + 0.5 * rng.standard_normal(80)})["x"]
    low, high = out["cluttered_ci"]
    assert (low + high) / 2 == pytest.approx(out["cluttered"], abs=1e-12) and 0 < high - low < 0.5
    assert "Clopper-Pearson" not in out["cluttered_ci_method"]


def test_unpaired_regression_label_constant_over_b_is_not_computable():
    # R^2 = 1 - SS_res/SS_tot has no SS_tot when every label of B is equal (scikit-learn's
    # r2_score then returns a placeholder); before, the bootstrap of the gap failed on it
    # with an IndexError.
    rng = np.random.default_rng(14)
    a, b = rng.standard_normal((40, 4)), rng.standard_normal((30, 4))
    out = probe.unpaired_probes(a, b, {"x": a[:, 0], "c": np.where(a[:, 0] > 0, "nut", "bolt")},
                                {"x": np.full(30, 2.0), "c": np.full(30, "nut")})
    assert out["x"] == {"not_computable": "the label has one value over domain B's rows, so R^2 on B is undefined"}
    # one class over B is fine for accuracy: its interval still holds the exact one of B's 30 rows
    from scipy.stats import binomtest

    exact = binomtest(round(out["c"]["cluttered"] * 30), 30).proportion_ci(0.95, method="exact")
    assert out["c"]["n_test_b"] == 30
    assert out["c"]["cluttered_ci"][0] <= exact.low and out["c"]["cluttered_ci"][1] >= exact.high
