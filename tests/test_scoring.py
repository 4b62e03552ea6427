"""score_features: the metrics object, breakdowns, validation, determinism, files."""

import json

import numpy as np
import pytest

from invariance import scoring
from invariance.breakdowns import holm_adjust
from invariance.errors import InvarianceError
from invariance.metrics.mmd import paired_permutation_test
from invariance.metrics.drift import paired_drift
from invariance.options import ScoringOptions
from invariance.readings import describe_metrics
from invariance.scoring import (
    _check_finite,
    _projection,
    load_feature_files,
    score_features,
)


def _pairs(n=40, d=6, seed=0, shift=0.0):
    rng = np.random.default_rng(seed)
    z = rng.standard_normal((n, d))
    return z + 0.3 * rng.standard_normal((n, d)), z + 0.3 * rng.standard_normal((n, d)) + shift


FAST = {"permutations": 99, "folds": 3}


@pytest.fixture(scope="module")
def scored():
    clean, cluttered = _pairs(n=48, shift=0.5)
    rng = np.random.default_rng(1)
    tasks = {
        "colour": np.where(clean[:, 0] > 0, "red", "blue").astype(object),
        "size": clean[:, 1].copy(),
    }
    factors = {
        "factor_background": np.array(["wood"] * 40 + ["steel"] * 8, dtype=object),
        "level": np.repeat([1.0, 2.0], 24),
    }
    names = [f"scene_{i:03d}.png" for i in range(48)]
    result = score_features(clean, cluttered, tasks=tasks, factors=factors, names=names, options=ScoringOptions(seed=2, **FAST))
    return clean, cluttered, tasks, factors, names, result, rng


def test_result_has_the_design_keys(scored):
    *_, result, _ = scored
    m = result["metrics"]
    assert {"accuracy", "ci", "proxy_a_distance", "p_value"} <= set(m["domain_classifier"])
    assert {"mmd2", "p_value", "permutations", "bandwidth"} <= set(m["mmd"])
    assert {"relative_drift", "relative_drift_ci", "pair_retrieval_top1"} <= set(m["paired_drift"])
    assert isinstance(m["cka"], float)
    assert {"kind", "clean", "cluttered", "gap"} <= set(m["probe"]["colour"])
    assert m["probe"]["size"]["kind"] == "regression"
    # a shift of 0.5 against noise 0.3 is obvious to every test: the domain classifier's
    # permutation p-value is at its floor 1 / (B + 1) (Phipson & Smyth 2010)
    assert m["domain_classifier"]["p_value"] <= 1 / (FAST["permutations"] + 1)
    assert m["mmd"]["p_value"] < 0.05
    json.dumps(result, allow_nan=False)


def test_breakdowns_per_factor_value(scored):
    *_, result, _ = scored
    background = result["breakdowns"]["factor_background"]
    assert background["wood"]["pairs"] == 40 and background["steel"]["pairs"] == 8
    # 8 pairs suffice for 3 folds (6 needed) but not for the MMD test (10 needed)
    assert background["steel"]["metrics"]["mmd"] == {"not_computable": "only 8 pairs; need 10"}
    assert "accuracy" in background["steel"]["metrics"]["domain_classifier"]
    assert set(result["breakdowns"]["level"]) == {"1", "2"}  # 1.0 reads "1"
    level_one = result["breakdowns"]["level"]["1"]["metrics"]
    assert level_one["paired_drift"]["relative_drift"] > 0


def test_breakdown_equals_scoring_the_subset(scored):
    clean, cluttered, *_, result, _ = scored
    wood = result["breakdowns"]["factor_background"]["wood"]["metrics"]
    alone = score_features(clean[:40], cluttered[:40], options=ScoringOptions(seed=2, **FAST))["metrics"]
    adjusted = dict(wood["domain_classifier"])
    assert adjusted.pop("p_value_adjusted") >= adjusted["p_value"]
    assert adjusted == alone["domain_classifier"]
    assert wood["cka"] == alone["cka"]
    # the subgroup's MMD test is a slice of the whole set's kernel matrix, so it uses the
    # whole set's bandwidth: the standalone test with that bandwidth (same seed) is the same
    whole = result["metrics"]["mmd"]
    standalone = paired_permutation_test(clean[:40], cluttered[:40], bandwidth=whole["bandwidth"],
                                         permutations=FAST["permutations"], seed=2)
    mmd = dict(wood["mmd"])
    assert mmd.pop("p_value_adjusted") >= mmd["p_value"]
    assert mmd["p_value"] == standalone["p_value"]
    assert mmd["mmd2"] == pytest.approx(standalone["mmd2"], rel=1e-12)


def test_holm_adjusted_p_values_by_hand():
    # Holm, Scand. J. Statist. 6 (1979): sort p_(1) <= ... <= p_(m); reject H_(i) while
    # p_(i) <= alpha / (m - i + 1). Adjusted p-values (Wright, Biometrics 48, 1992):
    # max_{j<=i} min(1, (m - j + 1) p_(j)). Worked by hand for p = (0.01, 0.04, 0.03, 0.005):
    #   sorted 0.005, 0.01, 0.03, 0.04 times 4, 3, 2, 1 = 0.02, 0.03, 0.06, 0.04
    #   running maximum 0.02, 0.03, 0.06, 0.06 -> in input order 0.03, 0.06, 0.06, 0.02.
    np.testing.assert_allclose(holm_adjust([0.01, 0.04, 0.03, 0.005]), [0.03, 0.06, 0.06, 0.02])
    # At alpha = 0.05 Holm rejects 0.005 (<= 0.05/4) and 0.01 (<= 0.05/3), then stops at
    # 0.03 > 0.05/2: exactly the adjusted values <= 0.05.
    assert list(holm_adjust([0.01, 0.04, 0.03, 0.005]) <= 0.05) == [True, False, False, True]
    # capped at 1 (2 x 0.5 = 1, then the running maximum), one test is its own p-value
    np.testing.assert_allclose(holm_adjust([0.6, 0.5]), [1.0, 1.0])
    np.testing.assert_allclose(holm_adjust([0.2]), [0.2])
    assert holm_adjust([]).size == 0


def test_breakdowns_carry_holm_adjusted_p_values(scored):
    *_, result, _ = scored
    correction = result["breakdowns_correction"]
    assert correction["method"] == "holm"
    for name in ("domain_classifier", "mmd"):
        entries = [group["metrics"][name] for groups in result["breakdowns"].values()
                   for group in groups.values() if "p_value" in group["metrics"][name]]
        # steel (8 pairs) is too small for MMD, so MMD's family is one test shorter
        assert correction["tests"][name] == len(entries) == (4 if name == "domain_classifier" else 3)
        raw = [e["p_value"] for e in entries]
        np.testing.assert_allclose([e["p_value_adjusted"] for e in entries], holm_adjust(raw))
    # the breakdowns keep their shape: columns hold factor values only
    assert set(result["breakdowns"]) == {"factor_background", "level"}
    assert all(set(g) == {"pairs", "metrics"} for groups in result["breakdowns"].values()
               for g in groups.values())


def test_subgroup_of_one_pair_is_listed_once_not_dropped():
    clean, cluttered = _pairs(n=30, seed=12, shift=0.2)
    factors = {"factor_a": np.array(["a"] * 29 + ["b"]), "level": np.array(["1"] * 15 + ["2"] * 15)}
    result = score_features(clean, cluttered, factors=factors, options=ScoringOptions(**FAST))
    lone = result["breakdowns"]["factor_a"]["b"]
    assert lone["pairs"] == 1
    assert all("not_computable" in v for v in lone["metrics"].values())
    skipped = result["breakdowns_skipped"]
    assert [(s["column"], s["value"], s["pairs"]) for s in skipped] == [("factor_a", "b", 1)]
    assert skipped[0]["needed"] == 10 and "MMD" in skipped[0]["reason"]
    assert sum("factor_a=b (1)" in w for w in result["warnings"]) == 1
    assert result["breakdowns_correction"]["tests"] == {"domain_classifier": 3, "mmd": 3}
    json.dumps(result, allow_nan=False)


def test_pairs_without_a_factor_value_are_counted():
    clean, cluttered = _pairs(n=30, seed=13)
    values = np.array(["x"] * 12 + ["y"] * 12 + [""] * 3 + [None] * 3, dtype=object)
    result = score_features(clean, cluttered, factors={"factor_a": values}, options=ScoringOptions(**FAST))
    assert set(result["breakdowns"]["factor_a"]) == {"x", "y"}
    assert any(w.startswith("6 pairs have no factor_a value") for w in result["warnings"])


def test_threads_and_repeated_subgroups_do_not_change_the_result(monkeypatch):
    clean, cluttered = _pairs(n=60, seed=14, shift=0.2)
    level = np.repeat(["1", "2", "3"], 20)
    factors = {"level": level, "factor_same": level.copy(), "factor_b": np.tile(["p", "q"], 30)}
    options = ScoringOptions(**FAST)
    monkeypatch.setattr(scoring, "_WORKERS", 1)
    serial = score_features(clean, cluttered, factors=factors, options=options)
    monkeypatch.setattr(scoring, "_WORKERS", 3)
    threaded = score_features(clean, cluttered, factors=factors, options=options)
    assert json.dumps(serial, sort_keys=True) == json.dumps(threaded, sort_keys=True)
    # the same pairs under two columns are scored once but are two tests of the family
    assert serial["breakdowns"]["level"] == serial["breakdowns"]["factor_same"]
    assert serial["breakdowns_correction"]["tests"]["mmd"] == 8


def test_pairs_carry_names_and_drift(scored):
    clean, cluttered, _, _, names, result, _ = scored
    per_pair = paired_drift(clean, cluttered, seed=2)["per_pair"]
    assert [p["name"] for p in result["pairs"]] == names
    np.testing.assert_allclose([p["drift"] for p in result["pairs"]], per_pair)


def test_same_inputs_and_seed_give_identical_json():
    clean, cluttered = _pairs(n=30, seed=3, shift=0.2)
    tasks = {"t": clean[:, 0].copy()}
    a = score_features(clean, cluttered, tasks=tasks, options=ScoringOptions(seed=7, **FAST))
    b = score_features(clean.copy(), cluttered.copy(), tasks=tasks, options=ScoringOptions(seed=7, **FAST))
    assert json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)


def test_projection_is_pca_of_both_domains():
    # Reference: numpy eigenvalues of the pooled covariance (PCA explained variance).
    clean, cluttered = _pairs(n=600, d=5, seed=4, shift=1.0)
    proj = _projection(clean, cluttered, seed=0)
    assert len(proj["clean"]) == len(proj["cluttered"]) == len(proj["indices"]) == 500
    pooled = np.vstack([clean[proj["indices"]], cluttered[proj["indices"]]])
    eig = np.sort(np.linalg.eigvalsh(np.cov(pooled.T)))[::-1]
    expected = np.round(eig[:2] / eig.sum(), 4)
    np.testing.assert_allclose(proj["explained_variance_ratio"], expected, atol=1e-4)
    assert all(round(v, 4) == v for v in proj["clean"][0])


def test_constant_features_never_crash_or_emit_nan():
    clean = np.ones((20, 4))
    result = score_features(clean, clean.copy(), options=ScoringOptions(**FAST))
    assert "not_computable" in result["metrics"]["mmd"]
    assert "not_computable" in result["metrics"]["cka"]
    assert "not_computable" in result["projection"]
    assert any("constant" in w for w in result["warnings"])
    json.dumps(result, allow_nan=False)


def test_duplicate_rows_warn():
    clean, cluttered = _pairs(n=20, seed=5)
    clean[5] = clean[4]
    result = score_features(clean, cluttered, options=ScoringOptions(**FAST))
    assert any("repeat" in w for w in result["warnings"])


def test_check_finite_finds_nested_nan():
    with pytest.raises(RuntimeError, match=r"result.metrics.mmd.p_value"):
        _check_finite({"metrics": {"mmd": {"p_value": float("nan")}}})
    with pytest.raises(RuntimeError, match=r"\[1\]"):
        _check_finite({"ci": [0.1, float("inf")]})


@pytest.mark.parametrize(
    "clean, cluttered, match",
    [
        (np.zeros(20), np.zeros(20), "2-D"),
        (np.zeros((20, 3)), np.zeros((21, 3)), r"\(20, 3\).*\(21, 3\)"),
        (np.zeros((5, 3)), np.zeros((5, 3)), "need at least 10"),
    ],
)
def test_bad_inputs_are_clear_errors(clean, cluttered, match):
    with pytest.raises(InvarianceError, match=match):
        score_features(clean, cluttered)


def test_nan_rows_are_counted():
    clean, cluttered = _pairs(n=20, seed=6)
    clean[[1, 2, 3], 2] = np.inf
    with pytest.raises(InvarianceError, match="3 of 20 rows"):
        score_features(clean, cluttered)


def test_wrong_names_and_label_lengths():
    clean, cluttered = _pairs(n=20, seed=7)
    with pytest.raises(InvarianceError, match="names"):
        score_features(clean, cluttered, names=["a"])
    with pytest.raises(InvarianceError, match="factor_x"):
        score_features(clean, cluttered, factors={"factor_x": np.zeros(3)})


def test_load_feature_files(tmp_path):
    clean, cluttered = _pairs(n=12, seed=8)
    np.save(tmp_path / "c.npy", clean.astype(np.float32))
    np.save(tmp_path / "k.npy", cluttered.astype(np.float32))
    a, b = load_feature_files(tmp_path / "c.npy", tmp_path / "k.npy")
    assert a.dtype == np.float32 and np.array_equal(b, cluttered.astype(np.float32))
    np.save(tmp_path / "short.npy", cluttered[:5])
    with pytest.raises(InvarianceError, match="c.npy has shape .*short.npy"):
        load_feature_files(tmp_path / "c.npy", tmp_path / "short.npy")
    with pytest.raises(InvarianceError, match="missing.npy: no such file"):
        load_feature_files(tmp_path / "missing.npy", tmp_path / "k.npy")
    np.save(tmp_path / "obj.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    with pytest.raises(InvarianceError, match="obj.npy: not a readable"):
        load_feature_files(tmp_path / "obj.npy", tmp_path / "k.npy")
    np.save(tmp_path / "flat.npy", np.zeros(7))
    with pytest.raises(InvarianceError, match="flat.npy: expected a 2-D"):
        load_feature_files(tmp_path / "flat.npy", tmp_path / "k.npy")
    bad = clean.copy()
    bad[0, 0] = np.nan
    np.save(tmp_path / "nan.npy", bad)
    with pytest.raises(InvarianceError, match="nan.npy: 1 of 12 rows"):
        load_feature_files(tmp_path / "nan.npy", tmp_path / "k.npy")
    (tmp_path / "text.npy").write_text("not numpy")
    with pytest.raises(InvarianceError, match="text.npy"):
        load_feature_files(tmp_path / "text.npy", tmp_path / "k.npy")


def test_readings_say_what_the_numbers_mean(scored):
    *_, result, _ = scored
    rows = describe_metrics(result["metrics"])
    names = [row[0] for row in rows]
    assert names[:2] == ["domain classifier accuracy", "MMD^2"]
    domain = rows[0]
    # the value is the accuracy as a plain number (readings.format_number), no longer a percentage
    assert "so the encoder separates the domains" in domain[3] and 0.5 < float(domain[1]) <= 1.0
    assert any(name.startswith("probe colour") for name in names)
    clean, _ = _pairs(n=20, seed=9)
    same = describe_metrics(score_features(clean, clean.copy(), options=ScoringOptions(**FAST))["metrics"])
    # identical views: the whole interval within the readings' margin of chance
    assert same[0][3].startswith("indistinguishable from chance")
    assert "no detectable difference" in same[1][3]
    flat = score_features(np.ones((20, 3)), np.ones((20, 3)), options=ScoringOptions(**FAST))
    constant = describe_metrics(flat["metrics"])
    assert ("CKA (debiased)", "n/a") == constant[-1][:2]


# Inputs that used to end in a traceback: each is now one clear InvarianceError.


def test_fewer_pairs_than_folds_need_is_a_clear_error_naming_the_folds():
    clean, cluttered = _pairs(n=12, seed=15)
    with pytest.raises(InvarianceError, match=r"need at least 40 .*20 folds.*lower folds"):
        score_features(clean, cluttered, options=ScoringOptions(permutations=99, folds=20))


@pytest.mark.parametrize("kind", ["all_zero", "constant", "zero_clean_only"])
def test_constant_or_zero_features_give_reasons_not_nan(kind):
    rng = np.random.default_rng(16)
    clean = np.zeros((24, 5)) if kind != "constant" else np.full((24, 5), 3.0)
    cluttered = rng.standard_normal((24, 5)) if kind == "zero_clean_only" else clean.copy()
    factors = {"level": np.repeat(["1", "2"], 12)}
    result = score_features(clean, cluttered, factors=factors, options=ScoringOptions(**FAST))
    json.dumps(result, allow_nan=False)  # no NaN or inf anywhere
    metrics = result["metrics"]
    assert "not_computable" in metrics["cka"] and "not_computable" in metrics["paired_drift"]
    if kind != "zero_clean_only":
        # no bandwidth exists when every feature vector is the same: said once per layer
        assert "identical" in metrics["mmd"]["not_computable"]
        assert "identical" in result["breakdowns"]["level"]["1"]["metrics"]["mmd"]["not_computable"]
    assert result["breakdowns_correction"]["tests"]["mmd"] == (2 if kind == "zero_clean_only" else 0)


def test_many_more_dimensions_than_pairs_score_cleanly():
    # d >> n: 12 pairs of 4,000-d features; every value finite and in range.
    rng = np.random.default_rng(17)
    z = rng.standard_normal((12, 4000))
    clean, cluttered = z + 0.3 * rng.standard_normal(z.shape), z + 0.3 * rng.standard_normal(z.shape)
    result = score_features(clean, cluttered, options=ScoringOptions(permutations=99, folds=2))
    json.dumps(result, allow_nan=False)
    m = result["metrics"]
    assert 0.0 <= m["domain_classifier"]["accuracy"] <= 1.0 and 0.0 < m["mmd"]["p_value"] <= 1.0
    assert 0.0 <= m["cka"] <= 1.0


def test_features_with_no_columns_are_a_clear_error():
    with pytest.raises(InvarianceError, match="0 columns"):
        score_features(np.zeros((30, 0)), np.zeros((30, 0)), options=ScoringOptions(**FAST))


def test_npy_header_promising_more_than_the_file_holds_is_refused_before_reading(tmp_path):
    # The .npy layout (magic, header dict, raw data) is numpy's own: numpy.lib.format.
    header = np.lib.format.header_data_from_array_1_0(np.zeros((2, 2), np.float32))
    header["shape"] = (10**6, 10**6)
    path = tmp_path / "claims_4tb.npy"
    with open(path, "wb") as fh:
        np.lib.format.write_array_header_1_0(fh, header)
        fh.write(b"\0" * 64)
    np.save(tmp_path / "ok.npy", np.zeros((4, 4), np.float32))
    with pytest.raises(InvarianceError, match="header claims shape"):
        load_feature_files(path, tmp_path / "ok.npy")


def test_features_too_large_to_square_are_a_clear_error():
    clean, cluttered = _pairs(n=20, seed=9)
    with pytest.raises(InvarianceError, match="too large to square"):
        score_features(clean * 1e200, cluttered * 1e200, options=ScoringOptions(**FAST))


def test_large_float32_features_give_the_metrics_of_rescaled_ones():
    # Every metric here is invariant to multiplying both views by one constant (the
    # classifier and probes standardise, MMD's median-heuristic bandwidth scales, drift is
    # relative, CKA is scale-free: Kornblith et al., ICML 2019, section 3), so 1e20 x the
    # features must give the metrics of the features themselves (float32 would overflow).
    clean, cluttered = _pairs(n=30, seed=10, shift=0.3)
    small = score_features(clean.astype(np.float32), cluttered.astype(np.float32), options=ScoringOptions(**FAST))
    large = score_features((clean * 1e20).astype(np.float32), (cluttered * 1e20).astype(np.float32),
                           options=ScoringOptions(**FAST))
    assert large["metrics"]["cka"] == pytest.approx(small["metrics"]["cka"], rel=1e-4)
    assert large["metrics"]["paired_drift"]["relative_drift"] == pytest.approx(
        small["metrics"]["paired_drift"]["relative_drift"], rel=1e-4)


def test_regression_label_near_1e300_gives_the_r2_of_the_rescaled_label():
    # R^2 is unchanged when the target is divided by a constant (its definition as
    # 1 - SS_res / SS_tot, scikit-learn's r2_score); a label near 1e300 used to overflow.
    clean, cluttered = _pairs(n=40, seed=11)
    y = clean[:, 0] + 0.1 * np.random.default_rng(1).standard_normal(40)
    plain = score_features(clean, cluttered, tasks={"y": y}, options=ScoringOptions(**FAST))
    huge = score_features(clean, cluttered, tasks={"y": y * 1e300}, options=ScoringOptions(**FAST))
    assert np.isfinite(huge["metrics"]["probe"]["y"]["clean"])
    assert huge["metrics"]["probe"]["y"]["clean"] == pytest.approx(plain["metrics"]["probe"]["y"]["clean"], abs=1e-6)
