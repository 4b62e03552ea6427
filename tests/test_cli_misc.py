"""Command-line checks that need no encoder run: encoder lists, report inputs, help text."""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from invariance.cli import cli
from invariance.encoder_list import read_encoder_list
from invariance.errors import InvarianceError


def test_encoders_toml_reads_specs_and_resolves_weights(tmp_path):
    path = tmp_path / "enc.toml"
    path.write_text('[[encoder]]\nspec = "torchvision:resnet18"\nweights = "w/r18.pt"\nname = "mine"\n'
                    '[[encoder]]\nspec = "python:pkg.mod:fn"\nlayers = ["a", "b"]\n')
    entries = read_encoder_list(path)
    assert [e.spec for e in entries] == ["torchvision:resnet18", "python:pkg.mod:fn"]
    assert entries[0].weights == tmp_path / "w" / "r18.pt"  # relative to the TOML file
    assert list(entries[1].layers) == ["a", "b"]


@pytest.mark.parametrize(
    "text, message",
    [
        ("title = 'x'\n", "lists no [[encoder]] tables"),
        ("[[encoder]]\nname = 'no spec'\n", "encoder 1 has no spec"),
        ("[[encoder]]\nspec = 'torchvision:resnet18'\ncolour = 'red'\n", "unknown keys ['colour']"),
        ("[[encoder]\n", "is not valid TOML"),
    ],
)
def test_encoders_toml_errors(tmp_path, text, message):
    path = tmp_path / "enc.toml"
    path.write_text(text)
    with pytest.raises(InvarianceError, match=message.replace("[", r"\[").replace("]", r"\]")):
        read_encoder_list(path)


def test_report_refuses_another_schema_and_writes_nothing(tmp_path):
    bad = tmp_path / "other.json"
    bad.write_text(json.dumps({"schema": "someone.else/2", "metrics": {}}))
    out = tmp_path / "r.html"
    res = CliRunner().invoke(cli, ["report", str(bad), "--out", str(out)])
    assert res.exit_code == 1 and "other.json" in res.output and not out.exists()


def test_unwritable_output_fails_before_any_work(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("x")
    res = CliRunner().invoke(cli, ["score", str(tmp_path / "no_data_needed_yet"), "--encoder", "torchvision:resnet18",
                                   "--json", str(blocker / "r.json")])
    # the output path is checked before the data folder is even looked at
    assert res.exit_code == 1 and "file" in res.output and "data folder" not in res.output


@pytest.mark.parametrize("command", ["scenes", "score", "align", "compare", "report", "demo", "bench", "layers"])
def test_every_command_has_help(command):
    res = CliRunner().invoke(cli, [command, "--help"])
    assert res.exit_code == 0 and "Usage: " in res.output and len(res.output.splitlines()) > 5


def test_align_help_prints_the_real_default_of_every_option():
    from invariance.options import AlignmentOptions, ScoringOptions

    text = " ".join(CliRunner().invoke(cli, ["align", "--help"], terminal_width=400).output.split())
    defaults = AlignmentOptions()
    for flag, value in [("--steps", defaults.steps), ("--held-out", defaults.held_out_fraction),
                        ("--anchor-weight", defaults.anchor_weight), ("--paired-weight", defaults.paired_weight),
                        ("--mean-weight", defaults.mean_weight), ("--task-weight", defaults.task_weight),
                        ("--learning-rate", defaults.learning_rate), ("--guard-margin", defaults.guard_margin),
                        ("--permutations", ScoringOptions().permutations)]:
        after = text.split(flag, 1)[1].split(" --", 1)[0]
        assert f"[default: {value}]" in after, (flag, after)
    assert "the library's" not in text
    from invariance.align.trunk import TAIL_FLOP_BUDGET

    after = text.split("--train-from", 1)[1].split(" --", 1)[0]
    assert f"at most {TAIL_FLOP_BUDGET / 1e6:.0f} MFLOP per image" in after, after


def test_score_help_says_what_data_may_be_and_lists_exit_codes():
    text = " ".join(CliRunner().invoke(cli, ["score", "--help"], terminal_width=400).output.split())
    assert "clean/ and cluttered/" in text and "manifest CSV" in text
    assert "Exit codes: 0" in text and "3 a gate was not met" in text


@pytest.mark.parametrize("args, flag", [
    (["score", "--features", "a.npy", "b.npy", "--permutations", "0"], "--permutations"),
    (["score", "--features", "a.npy", "b.npy", "--max-domain-accuracy", "nan"], "--max-domain-accuracy"),
    (["align", "d", "--encoder", "torchvision:resnet18", "--out", "o.pt", "--held-out", "0.95"], "--held-out"),
])
def test_bad_option_values_are_usage_errors_naming_the_flag(tmp_path, args, flag):
    res = CliRunner().invoke(cli, args)
    assert res.exit_code == 2 and flag in res.output and "Traceback" not in res.output


def test_score_help_puts_the_caution_beside_the_gates():
    from invariance import SAFETY_CAUTION

    text = " ".join(CliRunner().invoke(cli, ["score", "--help"], terminal_width=400).output.split())
    gates = text[text.index("--max-domain-accuracy"):]
    assert "95% upper end" in gates and "any scored layer" in gates
    assert "not a safety function" in gates and " ".join(SAFETY_CAUTION.split()) in gates


def _captured_compare(monkeypatch, tmp_path, args):
    from invariance import pipeline
    from invariance.results import make_comparison
    from report_fixtures import make_result

    seen = {}

    def fake(data, entries, **kwargs):
        seen["entries"] = list(entries)
        return make_comparison([make_result(seed=i, name=e.name or e.spec, spec=e.spec, with_layers=False,
                                            with_breakdowns=False) for i, e in enumerate(entries)])

    monkeypatch.setattr(pipeline, "compare_encoders", fake)
    res = CliRunner().invoke(cli, ["compare", str(tmp_path), *args, "--json", str(tmp_path / "c.json")])
    return res, seen


def test_compare_weights_and_names_reach_each_encoder_in_order(monkeypatch, tmp_path):
    (tmp_path / "w.pt").write_bytes(b"x")
    res, seen = _captured_compare(monkeypatch, tmp_path, [
        "--encoder", "torchvision:resnet18", "--weights", str(tmp_path / "w.pt"), "--name", "tuned ResNet",
        "--encoder", "torchvision:resnet34", "--weights", str(tmp_path / "w.pt"), "--name", "other"])
    assert res.exit_code == 0, res.output
    assert [(e.spec, e.weights, e.name) for e in seen["entries"]] == [
        ("torchvision:resnet18", tmp_path / "w.pt", "tuned ResNet"),
        ("torchvision:resnet34", tmp_path / "w.pt", "other")]
    written = json.loads((tmp_path / "c.json").read_text())
    assert "ISO 10218" in written["caution"] and all("caution" in r for r in written["results"])
    assert "verdict: " in res.output and "task information [95%]" in res.output


def test_compare_weights_given_for_some_encoders_only_is_a_usage_error(monkeypatch, tmp_path):
    res, seen = _captured_compare(monkeypatch, tmp_path, [
        "--encoder", "torchvision:resnet18", "--encoder", "torchvision:resnet34", "--weights", "w.pt"])
    assert res.exit_code == 2 and "--weights is given 1 time(s) for 2 --encoder" in res.output and not seen


def test_summary_prints_every_scored_layer_and_each_warning_once(capsys):
    from invariance.cli._print import print_summary
    from report_fixtures import make_result

    result = make_result(seed=1, name="bench CNN", spec="python:m:a", with_breakdowns=True)
    result["warnings"] = ["constant columns", "constant columns"]
    print_summary(result)
    out = capsys.readouterr().out
    for layer in result["layers"]:
        assert f"layer {layer}:" in out
    assert out.count("warning: constant columns") == 1
    assert "by factor_surface (0 = this factor off, the others on)" in out and out.startswith("bench CNN")
    assert "verdict: bench CNN: on cluttered views" in out
