"""Loading, checking, bundling and ranking result files (invariance.results)."""

from __future__ import annotations

import json
import math

import pytest

from invariance.errors import InvarianceError
from invariance.results import (
    COMPARISON_SCHEMA,
    RESULT_SCHEMA,
    check_same_dataset,
    load_as_comparison,
    load_result_files,
    make_comparison,
    metric_value,
    rank_results,
    validate_result,
)
from report_fixtures import make_failure, make_result, not_computable


def _write(path, data):
    path.write_text(json.dumps(data), encoding="utf-8")
    return path


def _light(seed, name, **kw):
    return make_result(seed=seed, name=name, spec=f"python:bench:{name}", with_layers=False,
                       with_breakdowns=False, **kw)


def _unlabelled(result):
    """``result`` without task labels: the ranking then falls back to invariance."""
    result["metrics"].pop("probe", None)
    return result


def _with(result, accuracy=None, drift=None):
    if accuracy is not None:
        result["metrics"]["domain_classifier"]["accuracy"] = accuracy
    if drift is not None:
        result["metrics"]["paired_drift"]["relative_drift"] = drift
    return result


def test_load_flattens_comparisons_in_order(tmp_path):
    a, b, c = _light(1, "a"), _light(2, "b"), _light(3, "c")
    single = _write(tmp_path / "a.json", a)
    bundle = _write(tmp_path / "bc.json", make_comparison([b, c]))
    loaded = load_result_files([single, bundle])
    assert [r["encoder"]["name"] for r in loaded] == ["a", "b", "c"]


def test_load_as_comparison_keeps_failures_and_warnings(tmp_path):
    bundle = make_comparison([_light(1, "a")], failures=[make_failure("broken")], warnings=["few pairs"])
    comparison = load_as_comparison([_write(tmp_path / "cmp.json", bundle)])
    assert comparison["schema"] == COMPARISON_SCHEMA
    assert [f["name"] for f in comparison["failures"]] == ["broken"]
    assert comparison["warnings"] == ["few pairs"]


@pytest.mark.parametrize("schema", ["invariance.result/2", "invariance.comparison/9", "other.tool/1", None])
def test_other_schema_names_the_file_and_what_is_expected(tmp_path, schema):
    data = _light(1, "a")
    data["schema"] = schema
    path = _write(tmp_path / "odd_result.json", data)
    with pytest.raises(InvarianceError) as info:
        load_result_files([path])
    message = str(info.value)
    assert str(path) in message and RESULT_SCHEMA in message
    assert "\n" not in message


def test_bad_result_inside_a_comparison_names_file_and_position(tmp_path):
    bundle = make_comparison([_light(1, "a")])
    bundle["results"].append({"schema": "invariance.result/0"})
    path = _write(tmp_path / "cmp.json", bundle)
    with pytest.raises(InvarianceError, match=r"cmp\.json \(result 2\)"):
        load_result_files([path])


def test_not_json_and_missing_file_name_the_file(tmp_path):
    broken = tmp_path / "broken.json"
    broken.write_text("{not json", encoding="utf-8")
    with pytest.raises(InvarianceError, match="broken.json: not valid JSON"):
        load_result_files([broken])
    with pytest.raises(InvarianceError, match="absent.json: file not found"):
        load_result_files([tmp_path / "absent.json"])
    with pytest.raises(InvarianceError, match="no result file"):
        load_result_files([])


def test_validate_requires_encoder_spec_and_metrics():
    result = _light(1, "a")
    del result["encoder"]["spec"]
    with pytest.raises(InvarianceError, match="mine.json: \"encoder.spec\" is missing"):
        validate_result(result, source="mine.json")
    result = _light(1, "a")
    del result["metrics"]
    with pytest.raises(InvarianceError, match="\"metrics\" is missing"):
        validate_result(result, source="mine.json")


def test_same_dataset_gives_no_warning():
    assert check_same_dataset([_light(1, "a"), _light(2, "b")]) == []


def test_mixed_datasets_warn_with_names():
    a, b = _light(1, "a"), _light(2, "b", content_hash="sha256:ffff", pairs=30)
    warnings = check_same_dataset([a, b])
    assert len(warnings) == 2  # one for the hash, one for the pair count
    assert all("different data sets" in w for w in warnings)
    assert "sha256:ffff: b" in warnings[0] and "sha256:0a1b2c3d: a" in warnings[0]


def test_make_comparison_adds_dataset_warning_once_and_normalises_failures():
    a, b = _light(1, "a"), _light(2, "b", content_hash="sha256:ffff")
    first = make_comparison([a, b], failures=[{"spec": "torchscript:x.pt", "error": "boom"}])
    again = make_comparison([a, b], warnings=first["warnings"])
    assert len(first["warnings"]) == 1 and again["warnings"] == first["warnings"]
    assert first["failures"] == [{"spec": "torchscript:x.pt", "name": "torchscript:x.pt", "error": "boom"}]


def test_without_labels_rank_lower_domain_accuracy_first():
    results = [_unlabelled(_with(_light(i, str(i)), accuracy=acc)) for i, acc in enumerate([0.9, 0.55, 0.7])]
    assert rank_results(results) == [1, 2, 0]


def test_with_labels_rank_by_task_information_not_by_invariance():
    # b is the most invariant (0.55) because its probes lost the task on cluttered views.
    a, b = _light(1, "a"), _light(2, "b")
    a = _with(a, accuracy=0.8)
    b = _with(b, accuracy=0.55)
    for task in ("part", "x"):
        b["metrics"]["probe"][task]["cluttered"] = b["metrics"]["probe"][task]["baseline"]
    assert rank_results([b, a]) == [1, 0]


def test_rank_ties_at_three_decimals_broken_by_drift():
    results = [
        _unlabelled(_with(_light(1, "a"), accuracy=0.6001, drift=0.4)),
        _unlabelled(_with(_light(2, "b"), accuracy=0.6004, drift=0.2)),
        _unlabelled(_with(_light(3, "c"), accuracy=0.6010, drift=0.1)),
    ]
    # a and b tie at 0.600, so b's lower drift wins; c is 0.601 and ranks after both.
    assert rank_results(results) == [1, 0, 2]


def test_rank_not_computable_last_ordered_by_drift():
    nc_high = _with(not_computable(_unlabelled(_light(1, "nc_high")), "domain_classifier", "one class only"), drift=0.9)
    nc_low = _with(not_computable(_unlabelled(_light(2, "nc_low")), "domain_classifier", "one class only"), drift=0.1)
    worst = _with(_unlabelled(_light(3, "worst")), accuracy=0.99, drift=1.2)
    no_drift = not_computable(not_computable(_unlabelled(_light(4, "none")), "domain_classifier", "x"),
                              "paired_drift", "y")
    assert rank_results([nc_high, no_drift, worst, nc_low]) == [2, 3, 0, 1]


def test_metric_value_refuses_not_computable_and_non_finite():
    metrics = _light(1, "a")["metrics"]
    assert metric_value(metrics, "cka") == pytest.approx(metrics["cka"])
    metrics["paired_drift"]["relative_drift"] = math.nan
    assert metric_value(metrics, "paired_drift", "relative_drift") is None
    metrics["mmd"] = {"not_computable": "fewer than 4 pairs"}
    assert metric_value(metrics, "mmd", "mmd2") is None
    assert metric_value(metrics, "absent", "x") is None


# --------------------------------------------------------------------------- hostile result files


@pytest.mark.parametrize("text, message", [
    ("[]", "not an invariance result"),
    ('"abc"', "not an invariance result"),
    ("null", "not an invariance result"),
    ("7" * 5000, r"not valid JSON \(a number has thousands of digits\)"),  # Python's int max-str-digits guard
    ("[" * 100_000 + "]" * 100_000, r"not valid JSON \(nested too deeply\)"),
    ('{"schema": NaN}', "NaN is not a JSON number"),  # RFC 8259, section 6: no NaN or Infinity
    ('{"schema": -Infinity}', "-Infinity is not a JSON number"),
], ids=["list", "string", "null", "5000-digits", "100000-deep", "nan", "infinity"])
def test_json_that_is_not_a_result_object_is_one_clear_error(tmp_path, text, message):
    path = tmp_path / "r.json"
    path.write_text(text)
    with pytest.raises(InvarianceError, match=message):
        load_as_comparison([path])


def test_warnings_must_be_a_list_of_sentences(tmp_path):
    # "warnings": "abc" used to be shown as three warnings, "a", "b" and "c".
    result = _light(0, "a")
    result["warnings"] = "abc"
    with pytest.raises(InvarianceError, match=r'r.json: "warnings" must be a list of sentences'):
        load_result_files([_write(tmp_path / "r.json", result)])
    comparison = {"schema": COMPARISON_SCHEMA, "results": [_light(0, "b")], "warnings": "abc"}
    with pytest.raises(InvarianceError, match=r'"warnings" must be a list'):
        load_as_comparison([_write(tmp_path / "c.json", comparison)])


@pytest.mark.parametrize("where, value, message", [
    (("domain_classifier", "accuracy"), 1e300, r"accuracy is 1e\+300, outside \[0, 1\]"),
    (("domain_classifier", "accuracy"), -0.1, r"accuracy is -0.1, outside"),
    (("domain_classifier", "ci"), [0.2, 1.5], r"ci\[1\] is 1.5"),
    (("mmd", "p_value"), 1.2, r"mmd.p_value is 1.2"),
    (("paired_drift", "pair_retrieval_top1"), 3, r"pair_retrieval_top1 is 3"),
    (("paired_drift", "relative_drift"), -2.0, r"relative_drift is -2"),
    (("probe", "part"), {"metric": "accuracy", "clean": 0.9, "cluttered": 7.0, "gap": -6.1}, r"part.cluttered is 7"),
])
def test_numbers_outside_their_range_are_refused_not_ranked(tmp_path, where, value, message):
    # Accuracies, shares and p-values are proportions; drift is a ratio of distances (>= 0).
    result = _light(0, "a")
    result["metrics"][where[0]][where[1]] = value
    with pytest.raises(InvarianceError, match=message):
        load_as_comparison([_write(tmp_path / "r.json", result)])


def test_infinite_numbers_are_refused_wherever_they_sit(tmp_path):
    path = tmp_path / "r.json"
    path.write_text(json.dumps(_light(0, "a")).replace('"folds": 5', '"folds": 1e999'))  # parses as inf
    with pytest.raises(InvarianceError, match="is inf, not finite"):
        load_as_comparison([path])


def test_range_checks_reach_layers_breakdowns_and_alignment(tmp_path):
    result = make_result(seed=1, name="n", spec="python:m:n")
    layer = next(iter(result["layers"]))
    result["layers"][layer]["domain_classifier"]["accuracy"] = 9.0
    with pytest.raises(InvarianceError, match=f"layers.{layer}.domain_classifier.accuracy is 9"):
        load_as_comparison([_write(tmp_path / "r.json", result)])


def test_odd_but_in_range_results_still_load(tmp_path):
    # Types the report shows as unreadable are left to it; only misleading numbers are refused.
    result = _light(0, "a")
    result["metrics"]["mmd"] = {"mmd2": "high", "p_value": None}
    result["metrics"]["cka"] = {"not_computable": "too few pairs"}
    assert load_as_comparison([_write(tmp_path / "r.json", result)])["results"][0]["metrics"]["mmd"]["mmd2"] == "high"


def test_debiased_cka_may_be_negative_but_linear_cka_may_not(tmp_path):
    # Debiased CKA is a cosine of U-centred kernel matrices (Song et al., JMLR 2012): in [-1, 1].
    result = _light(1, "a")
    result["metrics"]["cka"] = -0.04
    assert load_result_files([_write(tmp_path / "ok.json", result)])[0]["metrics"]["cka"] == -0.04
    result["metrics"]["cka_linear"] = -0.04
    with pytest.raises(InvarianceError, match=r"metrics\.cka_linear is -0\.04, outside \[0, 1\]"):
        load_result_files([_write(tmp_path / "bad.json", result)])


def test_caution_is_added_to_results_and_comparisons():
    from invariance import SAFETY_CAUTION
    from invariance.results import add_caution

    comparison = add_caution(make_comparison([_light(1, "a"), _light(2, "b")]))
    assert comparison["caution"] == SAFETY_CAUTION
    assert all(r["caution"] == SAFETY_CAUTION for r in comparison["results"])
    assert "ISO 10218" in add_caution(_light(3, "c"))["caution"]


def test_a_checkpoint_scored_on_its_alignment_pairs_is_warned_about_once():
    from invariance.results import aligned_on_same_pairs

    result = _light(1, "aligned")
    result["encoder"]["aligned_on"] = result["dataset"]["content_hash"]
    warning = aligned_on_same_pairs(result)
    assert warning and "scored on the pairs it was aligned on" in warning
    comparison = make_comparison([result], warnings=[warning])
    assert comparison["warnings"].count(warning) == 1
    result["encoder"]["aligned_on"] = "sha256:another"
    assert aligned_on_same_pairs(result) is None


def test_a_copy_whose_alignment_did_not_improve_is_not_titled_aligned():
    from invariance.results import display_name

    result = _light(1, "workbench CNN, clean-only, aligned")
    result["alignment"] = {"improved": False}
    assert display_name(result) == "workbench CNN, clean-only (alignment did not improve it)"
    result["alignment"]["improved"] = True
    assert display_name(result) == "workbench CNN, clean-only, aligned"
