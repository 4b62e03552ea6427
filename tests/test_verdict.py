"""Ranking and verdict on what the policy needs (invariance.verdict)."""

from __future__ import annotations

import copy

import numpy as np
import pytest
from scipy.stats import binomtest
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge
from sklearn.metrics import r2_score

from invariance import verdict
from invariance.gates import evaluate_gates
from invariance.options import Gates
from report_fixtures import blind_metrics, make_result


def _result(name, separability=0.4, seed=1, **kw):
    return make_result(seed=seed, name=name, spec=f"python:bench:{name.replace(' ', '_')}", with_layers=False,
                       with_breakdowns=False, separability=separability, **kw)


def _blind(name="blind encoder"):
    result = _result(name, seed=9)
    result["metrics"] = blind_metrics()
    result["gates"] = {}
    return result


def _probe(metric, clean, cluttered, baseline, gap_ci, decodable=True, n_test=90):
    return {"kind": "classification" if metric == "accuracy" else "regression", "metric": metric,
            "clean": clean, "cluttered": cluttered, "gap": clean - cluttered, "gap_ci": list(gap_ci),
            "baseline": baseline, "decodable": decodable, "n_train": 210, "n_test": n_test}


def _demo_like() -> list[dict]:
    """Probe and domain figures measured by `invariance demo` (300 evaluation pairs, seed 2027)."""
    figures = {
        "workbench CNN, clean-only training": (0.938, (0.890, 0.992), (0.922, 0.344, (0.478, 0.678)),
                                               (0.974, -0.411, (0.942, 1.829)), (0.975, 0.165, (0.607, 1.012))),
        "workbench CNN, clutter-augmented": (0.845, (0.805, 0.883), (0.922, 0.633, (0.189, 0.389)),
                                             (0.960, 0.458, (0.311, 0.691)), (0.958, 0.513, (0.282, 0.609))),
        "ResNet-18, random weights": (0.892, (0.845, 0.938), (0.300, 0.356, (-0.178, 0.056)),
                                      (0.798, -0.400, (0.737, 1.660)), (0.811, -0.225, (0.665, 1.407))),
        "workbench CNN, clean-only, aligned": (0.712, (0.672, 0.753), (0.911, 0.478, (0.322, 0.544)),
                                               (0.971, 0.257, (0.523, 0.906)), (0.977, 0.102, (0.622, 1.127))),
    }
    results = []
    for i, (name, (acc, ci, part, x, y)) in enumerate(figures.items()):
        result = _result(name, seed=i)
        m = result["metrics"]
        m["domain_classifier"].update(accuracy=acc, ci=list(ci))
        m["probe"] = {
            "part": _probe("accuracy", part[0], part[1], 0.244, part[2], decodable=name != "ResNet-18, random weights"),
            "x": _probe("r2", x[0], x[1], -0.001, x[2]),
            "y": _probe("r2", y[0], y[1], -0.008, y[2]),
            "angle": _probe("r2", -0.047, -0.045, -0.046, (-0.014, 0.010), decodable=False),
        }
        results.append(result)
    return results


def test_skill_of_an_r2_probe_is_its_r2_against_the_training_mean():
    # Murphy (Mon. Wea. Rev. 116, 1988; from memory): a skill score is (A - A_ref)/(A_perfect - A_ref);
    # for squared error against the mean forecast it is R^2. Checked with scikit-learn's r2_score
    # on scikit-learn's diabetes data (Efron et al., Ann. Statist. 2004).
    X, y = load_diabetes(return_X_y=True)
    model = Ridge(alpha=1.0).fit(X[:300], y[:300])
    score = r2_score(y[300:], model.predict(X[300:]))
    entry = _probe("r2", score + 0.1, score, 0.0, (0.05, 0.15))
    assert verdict.task_skill(entry).value == pytest.approx(score, abs=1e-12)


def test_skill_of_an_accuracy_is_the_share_of_the_way_from_the_baseline():
    # Worked example (common practice): 4 balanced classes, baseline 0.25; accuracy 0.625
    # is half-way to perfect. Its interval maps the exact Clopper-Pearson interval of 45 of
    # 72 held-out pairs (scipy.stats.binomtest, Clopper & Pearson, Biometrika 1934).
    entry = _probe("accuracy", 0.9, 0.625, 0.25, (0.2, 0.35), n_test=72)
    skill = verdict.task_skill(entry)
    ci = binomtest(45, 72).proportion_ci(0.95, method="exact")
    assert skill.value == pytest.approx(0.5)
    assert skill.low == pytest.approx((ci.low - 0.25) / 0.75) and skill.high == pytest.approx((ci.high - 0.25) / 0.75)
    # below the baseline is no usable information, not a negative amount of it
    assert verdict.task_skill(_probe("accuracy", 0.9, 0.1, 0.25, (0.7, 0.9))).value == 0.0
    # a stored cluttered interval wins over the fallback
    assert verdict.task_skill({**entry, "cluttered_ci": [0.55, 0.7]}).low == pytest.approx(0.4)


def test_a_blind_encoder_never_ranks_first_and_is_labelled():
    informative = [_result("plain CNN", 0.8, seed=2), _result("robust CNN", 0.2, seed=3)]
    for position in range(3):
        results = copy.deepcopy(informative)
        results.insert(position, _blind())
        ranking = verdict.rank(results)
        assert ranking.order[-1] == position and ranking.order[0] != position
        assert ranking.assessments[position].label == "collapsed"
        assert ranking.ranks[position] == 3
        text = verdict.plain(verdict.verdict(results, ranking))
        assert "blind encoder has collapsed" in text and "fails every gate" in text


def test_a_blind_encoder_alone_or_without_labels_is_not_recommended():
    alone = verdict.plain(verdict.verdict([_blind()]))
    assert alone.startswith("No encoder can be recommended")
    unlabelled = [_result("plain CNN", 0.8), _blind()]
    for result in unlabelled:
        result["metrics"].pop("probe")
    ranking = verdict.rank(unlabelled)
    assert ranking.basis == verdict.INVARIANCE_BASIS and ranking.order == [0, 1]
    assert verdict.BLIND_CAVEAT in verdict.plain(verdict.verdict(unlabelled, ranking))


def test_a_blind_encoder_fails_the_gates_that_a_user_set():
    # Issue 13: it passed --max-domain-accuracy 0.6 --max-probe-gap 0.05 with exit 0.
    gates = evaluate_gates(_blind(), Gates(max_domain_accuracy=0.6, max_probe_gap=0.05, max_relative_drift=5.0))
    assert not any(g["passed"] for g in gates.values())
    assert all("collapsed" in c["reason"] for g in gates.values() for c in g["checks"])


def test_on_the_demo_figures_the_augmented_cnn_leads_and_the_random_resnet_is_uninformative():
    results = _demo_like()
    ranking = verdict.rank(results)
    names = [r["encoder"]["name"] for r in results]
    ordered = [names[i] for i in ranking.order]
    assert ordered[0] == "workbench CNN, clutter-augmented"
    assert ordered.index("workbench CNN, clutter-augmented") < ordered.index("workbench CNN, clean-only, aligned")
    assert ranking.carried == ["part", "x", "y"] and ranking.dropped == ["angle"]
    resnet = names.index("ResNet-18, random weights")
    assert ranking.assessments[resnet].label == "uninformative" and ordered[-1] == names[resnet]
    text = verdict.plain(verdict.verdict(results, ranking))
    assert text.startswith("Try workbench CNN, clutter-augmented first on hardware")
    assert "ResNet-18, random weights is uninformative" in text and "angle" in text
    # the aligned copy's interval overlaps: the verdict says so rather than claiming a clear lead
    aligned = names.index("workbench CNN, clean-only, aligned")
    if ranking.ranks[aligned] == ranking.ranks[ranking.order[0]]:
        assert "share rank 1" in text and ranking.shown_rank(aligned).endswith("=")
    else:
        assert "first place is clear" in text


def test_ties_are_decided_only_by_intervals_that_do_not_overlap():
    a, b, c = (_result(n, seed=i) for i, n in enumerate(("a", "b", "c")))
    for result, (cluttered, half) in zip((a, b, c), ((0.70, 0.05), (0.66, 0.05), (0.30, 0.05))):
        result["metrics"]["probe"] = {"x": _probe("r2", 0.9, cluttered, 0.0, (0.9 - cluttered - half,
                                                                            0.9 - cluttered + half))}
    ranking = verdict.rank([c, b, a])
    assert ranking.order == [2, 1, 0]
    assert ranking.ranks == {2: 1, 1: 1, 0: 3}
    assert ranking.shown_rank(2) == "1=" and ranking.shown_rank(0) == "3"
    assert "share rank 1" in verdict.plain(verdict.verdict([c, b, a], ranking))


def test_an_encoder_that_lost_the_task_is_invariant_but_uninformative():
    lost = _result("forgetful CNN", seed=4)
    lost["metrics"]["domain_classifier"].update(accuracy=0.51, ci=[0.45, 0.57])
    for entry in lost["metrics"]["probe"].values():
        entry["cluttered"] = entry["baseline"]
    keeper = _result("keeper CNN", 0.5, seed=5)
    ranking = verdict.rank([lost, keeper])
    assert ranking.order == [1, 0]
    assert ranking.assessments[0].label == "invariant but uninformative"
    assert "forgetful CNN is invariant but uninformative" in verdict.plain(verdict.verdict([lost, keeper], ranking))


def test_worst_gap_keeps_units_apart_and_leaves_out_undecodable_labels():
    metrics = {"probe": {
        "part": _probe("accuracy", 0.9, 0.7, 0.25, (0.1, 0.3)),
        "x": _probe("r2", 0.9, 0.5, 0.0, (0.25, 0.55)),
        "angle": _probe("r2", -0.05, -2.0, -0.04, (1.5, 2.4), decodable=False),
    }}
    task, entry = verdict.worst_carried_gap(metrics)
    assert task == "x" and entry["metric"] == "r2"  # the angle gap (1.95) is not a lost task
    assert verdict.worst_carried_gap({"probe": {"angle": metrics["probe"]["angle"]}}) is None


def test_collapse_is_read_from_an_all_constant_warning():
    metrics = copy.deepcopy(_result("x")["metrics"])
    assert verdict.collapse_reason(metrics) is None
    assert verdict.collapse_reason(metrics, ["3 of 512 feature columns are constant over all images; ..."]) is None
    assert verdict.collapse_reason(metrics, ["512 of 512 feature columns are constant over all images; they "
                                             "carry no information"])
    assert np.isfinite(verdict.rank([_result("y")]).assessments[0].information.value)


def test_an_unpaired_accuracy_interval_counts_the_rows_of_b():
    # An unpaired probe scores its `cluttered` accuracy on B's rows (n_test_b), not on A's
    # held-out rows (n_test). A result written before cluttered_ci was stored: 48 of B's 64
    # rows right, 15 of A's 20. The skill interval maps the exact Clopper-Pearson interval of
    # 48 of 64 (Clopper & Pearson, Biometrika 26, 1934; scipy.stats.binomtest), not of 15 of 20.
    entry = {**_probe("accuracy", 0.75, 0.75, 0.5, (-0.2, 0.2), n_test=20), "n_test_b": 64, "trained_on": "A"}
    skill = verdict.task_skill(entry)
    over_b = binomtest(48, 64).proportion_ci(0.95, method="exact")
    assert skill.value == pytest.approx(0.5)
    assert skill.low == pytest.approx((over_b.low - 0.5) / 0.5)
    assert skill.high == pytest.approx((over_b.high - 0.5) / 0.5)
    over_a = binomtest(15, 20).proportion_ci(0.95, method="exact")
    assert skill.low > (over_a.low - 0.5) / 0.5 + 0.05  # the old interval, wider by the smaller count


def test_an_unpaired_verdict_speaks_of_domains_rows_and_episodes_not_pairs():
    # Two encoders of the same unpaired domains (8 episodes of 4 rows a side); their domain
    # accuracy intervals overlap chance, so the verdict names the sample behind them: the
    # unpaired classifier's rows_used and groups (32 and 32 rows in 8 and 8 groups), where
    # half its 64 held-out images would have been read as "32 pairs".
    from invariance.scoring import score_unpaired_features
    from invariance.options import ScoringOptions

    rng = np.random.default_rng(21)
    groups = np.repeat(np.arange(8), 4)

    def domain():
        return rng.standard_normal((8, 6))[groups] + 0.3 * rng.standard_normal((32, 6))

    a, b = domain(), domain()
    results = []
    for name, features_b in (("one", b), ("two", b + 0.5 * rng.standard_normal(b.shape))):
        scored = score_unpaired_features(a, features_b, groups_a=groups, groups_b=groups,
                                         options=ScoringOptions(permutations=20))
        results.append({**scored, "encoder": {"spec": name, "name": name}, "dataset": {"pairs": 0}})
    dc = results[0]["metrics"]["domain_classifier"]
    assert dc["rows_used"] == [32, 32] and dc["grouping"]["groups"] == [8, 8] and dc["n_test"] == 64
    text = verdict.plain(verdict.verdict(results))
    assert "inconclusive (32 rows of A and 32 of B in 8 and 8 groups; the interval reaches" in text
    assert "more episodes would narrow the intervals" in text
    assert " pairs" not in text
