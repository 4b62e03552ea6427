"""Gates decide on the interval's unsafe end, on every scored layer and task (invariance.gates)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner

from invariance import SAFETY_CAUTION
from invariance.cli import cli
from invariance.errors import GateFailed
from invariance.gates import evaluate_gates, gate_lines, raise_for_gates
from invariance.options import Gates
from report_fixtures import make_result


def _result(**kw):
    return make_result(seed=1, name="bench CNN", spec="python:bench:cnn", with_breakdowns=False, **kw)


def _domain(result, accuracy, ci, layer=None):
    metrics = result["layers"][layer] if layer else result["metrics"]
    metrics["domain_classifier"].update(accuracy=accuracy, ci=list(ci))
    return result


def test_the_upper_end_of_the_interval_decides_not_the_point():
    # Issue 13: 0.68 [0.55, 0.80] must not pass --max-domain-accuracy 0.7.
    result = _domain(_result(with_layers=False), 0.68, (0.55, 0.80))
    gate = evaluate_gates(result, Gates(max_domain_accuracy=0.7))["max_domain_accuracy"]
    assert gate["passed"] is False and gate["value"] == 0.68 and gate["bound"] == 0.80
    assert evaluate_gates(result, Gates(max_domain_accuracy=0.8))["max_domain_accuracy"]["passed"] is True


def test_every_scored_layer_is_gated_and_named():
    # Issue 13: with layer2, layer3 and output scored, the output's 0.658 passed while layer2 was 0.758.
    result = _result(with_layers=True)
    result["layers"] = {k: result["layers"][k] for k in ("block2", "block3", "output")}
    _domain(result, 0.758, (0.71, 0.80), "block2")
    _domain(result, 0.70, (0.65, 0.74), "block3")
    _domain(result, 0.658, (0.61, 0.70), "output")
    gate = evaluate_gates(result, Gates(max_domain_accuracy=0.75))["max_domain_accuracy"]
    assert gate["passed"] is False and gate["layer"] == "block2"
    assert [(c["layer"], c["passed"]) for c in gate["checks"]] == [("block2", False), ("block3", True),
                                                                   ("output", True)]
    lines = [line for _, line in gate_lines({"max_domain_accuracy": gate})]
    assert lines[0].startswith("gate failed: max_domain_accuracy 0.75: domain accuracy, layer block2")
    assert lines[1].startswith("gate passed: max_domain_accuracy 0.75: domain accuracy, layer block3")


def test_probe_gaps_are_gated_per_task_in_their_own_unit_without_undecodable_labels():
    result = _result(with_layers=False)
    probes = result["metrics"]["probe"]
    probes["part"].update(gap=0.03, gap_ci=[-0.02, 0.08])
    probes["x"].update(gap=0.02, gap_ci=[-0.01, 0.04])
    probes["angle"] = {**probes["x"], "gap": 0.9, "gap_ci": [0.7, 1.1], "decodable": False}
    gate = evaluate_gates(result, Gates(max_probe_gap=0.05))["max_probe_gap"]
    checks = {c["task"]: c for c in gate["checks"]}
    assert set(checks) == {"part", "x"}  # angle is not decodable on clean: left out
    assert checks["part"]["metric"] == "probe gap (accuracy)" and checks["x"]["metric"] == "probe gap (R\u00b2)"
    assert checks["part"]["passed"] is False and checks["x"]["passed"] is True
    assert gate["task"] == "part" and gate["passed"] is False


def test_not_computable_or_no_interval_fails_closed():
    result = _result(with_layers=False)
    result["metrics"]["paired_drift"] = {"not_computable": "only 2 pairs; need 3"}
    del result["metrics"]["domain_classifier"]["ci"]
    gates = evaluate_gates(result, Gates(max_domain_accuracy=0.99, max_relative_drift=10.0))
    assert gates["max_domain_accuracy"]["checks"][0]["reason"] == "no 95% interval to decide on"
    assert gates["max_relative_drift"]["checks"][0]["reason"] == "not computable: only 2 pairs; need 3"
    with pytest.raises(GateFailed, match=r"^gate not met: max_domain_accuracy \(layer output: no 95% interval"):
        raise_for_gates(gates)


def _features(tmp_path, shift, n=120, d=16, seed=0):
    rng = np.random.default_rng(seed)
    scene = rng.normal(size=(n, d))
    paths = []
    for name, extra in (("clean.npy", 0.0), ("cluttered.npy", shift)):
        np.save(tmp_path / name, (scene + 0.3 * rng.normal(size=(n, d)) + extra).astype(np.float32))
        paths.append(str(tmp_path / name))
    return paths


def test_cli_prints_a_failed_gate_as_a_result_not_an_error(tmp_path):
    clean, cluttered = _features(tmp_path, shift=1.0)
    out = tmp_path / "r.json"
    res = CliRunner().invoke(cli, ["score", "--features", clean, cluttered, "--json", str(out), "--permutations", "50",
                                   "--max-domain-accuracy", "0.6", "--max-relative-drift", "100"],
                             catch_exceptions=False)
    assert res.exit_code == 3
    assert "error:" not in res.output and "gate not met: max_domain_accuracy (layer output" in res.output
    assert "gate failed: max_domain_accuracy 0.6: domain accuracy, layer output: 95% upper end" in res.output
    passed = res.output.index("gate passed: max_relative_drift 100.0")
    assert res.output.index("caution: a passed gate is a regression check", passed) > passed
    written = json.loads(out.read_text())
    assert written["caution"] == SAFETY_CAUTION and written["gates"]["max_domain_accuracy"]["bound"] > 0.6


def test_unpaired_results_fail_the_drift_gate_with_the_reason_it_was_not_computed(tmp_path):
    # Unpaired domains have no drift; the gate fails closed and says why, in one line.
    rng = np.random.default_rng(0)
    a, b = tmp_path / "a.npy", tmp_path / "b.npy"
    np.save(a, rng.normal(size=(60, 8)).astype(np.float32))
    np.save(b, rng.normal(size=(70, 8)).astype(np.float32))
    res = CliRunner().invoke(cli, ["score", "--features", str(a), str(b), "--unpaired", "--permutations", "50",
                                   "--max-relative-drift", "0.5"])
    assert res.exit_code == 3
    assert "frames=[60, 70]" in res.output  # not "pairs=0"
    assert "gate failed: max_relative_drift" in res.output and "needs the two views of one scene" in res.output
    assert "permutation of domain labels over whole groups" in res.output
