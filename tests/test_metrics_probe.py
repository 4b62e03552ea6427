"""Linear probes trained on clean pairs, scored on held-out clean and cluttered pairs."""

import json

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression, RidgeCV
from sklearn.metrics import r2_score
from sklearn.model_selection import train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from invariance.errors import InvarianceError
from invariance.metrics.probe import PROBE_C, RIDGE_ALPHAS, linear_probes


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


def test_identical_features_have_no_gap(digits):
    X, labels = digits
    result = linear_probes(X, X.copy(), {"digit": labels})["digit"]
    assert result["gap"] == 0.0


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
