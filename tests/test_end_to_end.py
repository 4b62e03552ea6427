"""End to end through the command line: scenes -> score -> compare -> report."""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
from click.testing import CliRunner

from invariance.cli import cli

pytestmark = pytest.mark.slow

SMALL_ENCODER = "python:invariance.zoo:clean_only_encoder"


@pytest.fixture(scope="module")
def scenes_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("e2e") / "scenes"
    res = CliRunner().invoke(cli, ["scenes", str(out), "--pairs", "60", "--size", "64", "--seed", "11", "--quiet"])
    assert res.exit_code == 0, res.output
    return out


def _invoke(args):
    res = CliRunner().invoke(cli, args)
    assert res.exit_code == 0, res.output + repr(res.exception)
    return res


def test_score_writes_result_and_report(scenes_dir, tmp_path):
    out, html, cache = tmp_path / "r.json", tmp_path / "r.html", tmp_path / "cache"
    _invoke(["score", str(scenes_dir), "--encoder", SMALL_ENCODER, "--json", str(out), "--report", str(html),
             "--permutations", "100", "--cache-dir", str(cache), "--quiet"])
    result = json.loads(out.read_text())
    assert result["dataset"]["pairs"] == 60
    assert result["encoder"]["spec"] == SMALL_ENCODER
    assert set(result["metrics"]["probe"]) == {"part", "x", "y", "angle"}
    assert set(result["breakdowns"]) >= {"level", "factor_surface", "factor_distractors", "factor_lighting"}
    assert len(result["pairs"]) == 60 and result["pairs"][0]["name"] == "scene_00000.png"
    text = html.read_text()
    assert "<html" in text.lower() and not re.search(r"https?://", text)


def test_several_layers_give_a_profile(scenes_dir, tmp_path):
    out = tmp_path / "r.json"
    _invoke(["score", str(scenes_dir), "--encoder", SMALL_ENCODER, "--layer", "block1", "--layer", "block3",
             "--json", str(out), "--permutations", "50", "--no-cache", "--quiet"])
    result = json.loads(out.read_text())
    assert list(result["layers"]) == ["block1", "block3"]
    assert result["encoder"]["layer"] == "block3"
    assert result["metrics"] == result["layers"]["block3"]


def test_compare_then_report_gives_same_numbers(scenes_dir, tmp_path):
    cmp_json, cmp_html, rep_html = tmp_path / "c.json", tmp_path / "c.html", tmp_path / "again.html"
    _invoke(["compare", str(scenes_dir), "--encoder", SMALL_ENCODER,
             "--encoder", "python:invariance.zoo:clutter_augmented_encoder", "--encoder", "torchvision:nope_net",
             "--json", str(cmp_json), "--report", str(cmp_html), "--permutations", "50", "--no-cache", "--quiet"])
    comparison = json.loads(cmp_json.read_text())
    assert comparison["schema"] == "invariance.comparison/1"
    assert len(comparison["results"]) == 2
    assert comparison["failures"][0]["spec"] == "torchvision:nope_net"  # reported, not fatal
    # both encoders scored on the same pairs and folds
    a, b = (r["metrics"]["domain_classifier"] for r in comparison["results"])
    assert a["n_test"] == b["n_test"] == 120
    _invoke(["report", str(cmp_json), "--out", str(rep_html)])

    def numbers(path):
        return re.findall(r"\d+\.\d{3}", path.read_text())

    assert numbers(cmp_html)[:40] == numbers(rep_html)[:40]


def test_warm_cache_skips_the_forward_pass(scenes_dir, tmp_path, monkeypatch):
    from invariance import pipeline
    from invariance.options import ExtractionOptions, ScoringOptions

    cache = tmp_path / "cache"
    first = pipeline.score_dataset(scenes_dir, SMALL_ENCODER, extraction=ExtractionOptions(cache_dir=cache),
                                   scoring=ScoringOptions(permutations=20), progress=False)
    import torch

    calls = []
    monkeypatch.setattr(torch.nn.Module, "__call__", lambda self, *a, **k: calls.append(1) or (_ for _ in ()).throw(
        AssertionError("forward pass on a warm cache")))
    second = pipeline.score_dataset(scenes_dir, SMALL_ENCODER, extraction=ExtractionOptions(cache_dir=cache),
                                   scoring=ScoringOptions(permutations=20), progress=False)
    assert not calls
    np.testing.assert_allclose(first["metrics"]["cka"], second["metrics"]["cka"])
