"""`invariance align` on the command line: the contract of docs/design.md (exit codes, outputs,
options).

The alignment itself is checked against outside references in test_align.py; here the
command's plumbing is checked: every option reaches the library, the checkpoint loads as
``checkpoint:FILE`` in another command, and bad input leaves nothing behind.
"""

from __future__ import annotations

import json

import pytest
import torch
from click.testing import CliRunner

from invariance.cli import cli

torch.set_num_threads(min(2, torch.get_num_threads()))  # a shared 2-core machine

ENCODER = "python:invariance.zoo:workbench_cnn"  # untrained: no shipped weights needed
TRAINED = "python:invariance.zoo:clean_only_encoder"  # shipped weights, trained on clean scenes
QUICK = ["--steps", "4", "--batch-size", "8", "--permutations", "20", "--quiet"]
# 40 steps on 120 pairs improve the clean-only encoder on its 36 held-out pairs (as in
# test_align.py's RUN, whose 10% guard margin this shares).
IMPROVING = ["--steps", "40", "--batch-size", "16", "--guard-margin", "0.1", "--permutations", "20", "--quiet"]


@pytest.fixture(scope="module")
def scene_dir(tmp_path_factory):
    from invariance.scenes import generate_scenes

    root = tmp_path_factory.mktemp("cli_align") / "set"
    generate_scenes(root, pairs=40, size=64, seed=5, level=2)
    return root


@pytest.fixture(scope="module")
def trained_dir(tmp_path_factory):
    from invariance.scenes import generate_scenes

    root = tmp_path_factory.mktemp("cli_align_trained") / "set"
    generate_scenes(root, pairs=120, size=64, seed=11, level=3)
    return root


@pytest.fixture(scope="module")
def aligned(trained_dir, tmp_path_factory):
    folder = tmp_path_factory.mktemp("cli_align_out")
    out, result = folder / "aligned.pt", folder / "aligned.json"
    res = CliRunner().invoke(cli, ["align", str(trained_dir), "--encoder", TRAINED, "--out", str(out),
                                   "--json", str(result), "--mean-weight", "12", "--paired-weight", "3.5",
                                   "--anchor-weight", "8", "--held-out", "0.3", "--objective", "combined",
                                   *IMPROVING])
    return {"res": res, "out": out, "json": result, "folder": folder}


def test_align_writes_checkpoint_and_result_with_the_given_weights(aligned):
    res = aligned["res"]
    assert res.exit_code == 0, res.output
    assert aligned["out"].is_file()
    result = json.loads(aligned["json"].read_text())
    settings = result["alignment"]["settings"]
    assert (settings["mean_weight"], settings["paired_weight"], settings["anchor_weight"]) == (12.0, 3.5, 8.0)
    assert settings["steps"] == 40 and result["alignment"]["steps_run"] == 40
    assert settings["objective"] == "combined"
    assert result["alignment"]["held_out_pairs"] == 36  # 30% of 120 pairs
    assert result["alignment"]["improved"] is True and result["encoder"]["spec"] == f"checkpoint:{aligned['out']}"
    assert set(result["alignment"]["curves"]) >= {"loss_mean", "loss_paired", "val_domain_accuracy"}
    # stdout: before/after and the caution
    assert "before" in res.output and "after" in res.output and "checkpoint:" in res.output
    assert "improved: held-out relative drift" in res.output
    # the judged fall and its paired interval, as printed and as stored
    fall = result["alignment"]["drift_change"]
    low, high = fall["relative_fall_ci"]
    assert low > 0
    assert f"drift fall       {fall['relative_fall']:.1%} (95% interval {low:.1%} to {high:.1%}" in res.output
    assert "not a certificate" in res.output


def test_aligned_checkpoint_is_scored_by_another_command(aligned, trained_dir):
    result_path = aligned["folder"] / "score.json"
    res = CliRunner().invoke(cli, ["score", str(trained_dir), "--encoder", f"checkpoint:{aligned['out']}",
                                   "--json", str(result_path), "--permutations", "20", "--quiet", "--no-cache"])
    assert res.exit_code == 0, res.output
    metrics = json.loads(result_path.read_text())["metrics"]
    assert 0.0 <= metrics["domain_classifier"]["accuracy"] <= 1.0


def test_align_refuses_too_few_pairs_and_writes_nothing(tmp_path):
    from invariance.scenes import generate_scenes

    generate_scenes(tmp_path / "tiny", pairs=12, size=32, seed=1, level=1)
    out, result = tmp_path / "never.pt", tmp_path / "never.json"
    res = CliRunner().invoke(cli, ["align", str(tmp_path / "tiny"), "--encoder", ENCODER, "--out", str(out),
                                   "--json", str(result), *QUICK])
    assert res.exit_code == 1
    assert "at least" in res.output and "pairs" in res.output
    assert not out.exists() and not result.exists()


def test_align_rejects_a_negative_weight_as_a_usage_error(scene_dir, tmp_path):
    res = CliRunner().invoke(cli, ["align", str(scene_dir), "--encoder", ENCODER, "--out", str(tmp_path / "x.pt"),
                                   "--mean-weight", "-1", *QUICK])
    assert res.exit_code == 2 and "--mean-weight" in res.output
    assert not (tmp_path / "x.pt").exists()


def test_a_run_that_does_not_improve_writes_no_checkpoint_and_can_fail_the_command(scene_dir, tmp_path):
    # Learning rate 1e-8 leaves the encoder as it was: the held-out drift cannot fall.
    out, result = tmp_path / "never.pt", tmp_path / "result.json"
    args = ["align", str(scene_dir), "--encoder", ENCODER, "--out", str(out), "--json", str(result),
            "--learning-rate", "1e-8", *QUICK]
    res = CliRunner().invoke(cli, args)
    assert res.exit_code == 0, res.output
    assert "not improved:" in res.output and "not presented as aligned" in res.output
    assert not out.exists()
    written = json.loads(result.read_text())
    assert written["alignment"]["improved"] is False and written["alignment"]["checkpoint"] is None
    assert written["encoder"]["spec"] == ENCODER  # the result names the original, not a missing checkpoint
    assert written["metrics"] == written["alignment"]["before"]
    res = CliRunner().invoke(cli, [*args, "--require-improvement"])
    assert res.exit_code == 3, res.output


def test_unknown_objective_is_a_usage_error(scene_dir, tmp_path):
    res = CliRunner().invoke(cli, ["align", str(scene_dir), "--encoder", ENCODER, "--out", str(tmp_path / "x.pt"),
                                   "--objective", "mmd", *QUICK])
    assert res.exit_code == 2 and "--objective" in res.output
