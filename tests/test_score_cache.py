"""The score cache: the same features, labels and options give back the same statistics without recomputing."""

from __future__ import annotations

import json

import pytest

from invariance import pipeline, scoring
from invariance.options import ExtractionOptions, ScoringOptions

SPEC = "python:invariance.zoo:workbench_cnn"


@pytest.fixture(scope="module")
def scene_set(tmp_path_factory):
    from invariance.scenes import generate_scenes

    root = tmp_path_factory.mktemp("scenes") / "set"
    generate_scenes(root, pairs=12, size=32, seed=5)
    return root


def _score(data, cache, permutations=20):
    return pipeline.score_dataset(data, SPEC, extraction=ExtractionOptions(cache_dir=cache, image_size=32),
                                  scoring=ScoringOptions(permutations=permutations, seed=1), progress=False)


def _without_timings(result):
    return json.loads(json.dumps({k: v for k, v in result.items() if k != "environment"}, default=str))


def test_a_repeat_reads_the_statistics_back_unchanged(tmp_path, scene_set, monkeypatch):
    first = _score(scene_set, tmp_path / "cache")

    def no_statistics(*args, **kwargs):
        raise AssertionError("statistics were recomputed")

    monkeypatch.setattr(scoring, "score_features", no_statistics)
    again = _score(scene_set, tmp_path / "cache")
    assert _without_timings(again) == _without_timings(first)
    # other scoring options are another key: computed again (and here, caught)
    with pytest.raises(AssertionError, match="recomputed"):
        _score(scene_set, tmp_path / "cache", permutations=30)


def test_an_edited_entry_is_ignored_and_recomputed(tmp_path, scene_set, monkeypatch):
    first = _score(scene_set, tmp_path / "cache")
    entry = next((tmp_path / "cache" / "scores").glob("*.json"))
    stored = json.loads(entry.read_text())
    layer = next(iter(stored["scored"]))
    stored["scored"][layer]["metrics"]["cka"] = 0.999  # a tampered figure fails the checksum
    entry.write_text(json.dumps(stored))
    calls = []
    real = scoring.score_features
    monkeypatch.setattr(scoring, "score_features", lambda *a, **k: calls.append(1) or real(*a, **k))
    again = _score(scene_set, tmp_path / "cache")
    assert calls and again["metrics"]["cka"] == first["metrics"]["cka"]


def test_no_cache_folder_means_nothing_is_kept(tmp_path, scene_set):
    pipeline.score_dataset(scene_set, SPEC, extraction=ExtractionOptions(cache_dir=None, image_size=32),
                           scoring=ScoringOptions(permutations=20, seed=1), progress=False)
    assert not any(tmp_path.iterdir())
