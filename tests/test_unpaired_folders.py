"""Unpaired image folders end to end: detected, announced, scored without a fake pairing."""

from __future__ import annotations

import json

import numpy as np
from click.testing import CliRunner
from PIL import Image

from invariance.cli import cli

from test_sources_hdf5 import SMALL_ENCODER, bench_frames


def _folder(root, sub, episodes, frames, clutter, first):
    """PNG frames named by episode; labels.csv gives each image its episode and a class."""
    rows = ["file,episode,part"]
    for e in range(first, first + episodes):
        for t, img in enumerate(bench_frames(e, frames, clutter=clutter)):
            name = f"ep{e:03d}_{t:02d}.png"
            (root / sub).mkdir(parents=True, exist_ok=True)
            Image.fromarray(img).save(root / sub / name)
            rows.append(f"{name},ep{e:03d},{'nut' if e % 2 else 'bolt'}")
    (root / sub / "labels.csv").write_text("\n".join(rows) + "\n")


def test_folder_whose_views_share_no_name_is_scored_unpaired_and_announced(tmp_path, one_torch_thread):
    root = tmp_path / "data"
    _folder(root, "clean", 16, 4, clutter=False, first=0)
    _folder(root, "cluttered", 16, 4, clutter=True, first=100)  # other scenes: no pairs exist
    out = tmp_path / "r.json"
    run = CliRunner().invoke(cli, ["score", str(root), "--encoder", SMALL_ENCODER, "--image-size",
                                                   "32", "--permutations", "499", "--json", str(out)],
                                             catch_exceptions=False)
    assert run.exit_code == 0, run.output
    assert "share no file name; scoring them as unpaired domains" in run.stderr
    result = json.loads(out.read_text())
    assert result["pairing"] == "unpaired" and "paired_drift" not in result["metrics"]
    assert "paired_drift" in result["not_computed"] and result["pairs"] == []
    # the episode column of each folder's labels.csv groups its images: 16 episodes a side
    assert result["metrics"]["domain_classifier"]["grouping"]["groups"] == [16, 16]
    assert result["metrics"]["mmd"]["p_value"] < 0.01
    assert set(result["metrics"]["probe"]) == {"part"}


def test_two_folders_of_the_same_scenes_with_unpaired_flag_are_calibrated_per_file(tmp_path, one_torch_thread):
    # No clutter, different scenes in the two folders drawn by the same rule: the null
    # holds. One run cannot show calibration (tests/test_unpaired.py repeats it on
    # features); it checks the end-to-end path does not manufacture a difference.
    a, b = tmp_path / "a", tmp_path / "b"
    _folder(a, "imgs", 12, 4, clutter=False, first=0)
    _folder(b, "imgs", 12, 4, clutter=False, first=200)
    out = tmp_path / "r.json"
    run = CliRunner().invoke(cli, ["score", f"images:{a / 'imgs'}", f"images:{b / 'imgs'}", "--unpaired",
                                   "--encoder", SMALL_ENCODER, "--image-size", "32", "--permutations", "99",
                                   "--quiet", "--json", str(out)], catch_exceptions=False)
    assert run.exit_code == 0, run.output
    result = json.loads(out.read_text())
    assert result["metrics"]["mmd"]["p_value"] > 0.01 and result["metrics"]["domain_classifier"]["p_value"] > 0.01
    assert np.isclose(result["metrics"]["domain_classifier"]["accuracy"], 0.5, atol=0.2)


def test_compare_ranks_encoders_on_two_unpaired_domains(tmp_path, one_torch_thread):
    from invariance.options import ExtractionOptions, ScoringOptions
    from invariance.pipeline import compare_encoders

    a, b = tmp_path / "a", tmp_path / "b"
    _folder(a, "imgs", 10, 3, clutter=False, first=0)
    _folder(b, "imgs", 10, 3, clutter=True, first=300)
    comparison = compare_encoders(f"images:{a / 'imgs'}", [SMALL_ENCODER, "torchvision:nope_net"],
                                  data_b=f"images:{b / 'imgs'}", extraction=ExtractionOptions(image_size=32),
                                  scoring=ScoringOptions(permutations=50), progress=False)
    assert len(comparison["results"]) == 1 and comparison["failures"][0]["spec"] == "torchvision:nope_net"
    assert comparison["results"][0]["pairing"] == "unpaired"
