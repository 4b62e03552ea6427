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
