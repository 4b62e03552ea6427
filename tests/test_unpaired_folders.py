"""Unpaired image folders end to end: detected, announced, scored without a fake pairing."""

from __future__ import annotations

import json

import numpy as np
from click.testing import CliRunner
from PIL import Image

import pytest

from invariance.cli import cli
from invariance.data import domain_labels
from invariance.errors import InvarianceError
from invariance.scenes import pair_rng, render_pair

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


def unpaired_root(root, episodes, frames, *, first_b=500, root_labels=True):
    """An unpaired data folder: other scenes under clean/ and cluttered/, one labels.csv at the root.

    Rows are keyed clean/NAME and cluttered/NAME with the episode, the target's x (a
    regression target) and factor_light, 0 or 1 alternating by episode in both domains;
    only cluttered/ episodes at factor_light 1 are filmed with clutter, so the domains
    differ at 1 and not at 0. Returns the rows written.
    """
    rows = ["file,episode,x,factor_light"]
    for sub, first in (("clean", 0), ("cluttered", first_b)):
        (root / sub).mkdir(parents=True, exist_ok=True)
        for e in range(first, first + episodes):
            light = e % 2
            x = render_pair(pair_rng(0, e), size=32, level=3)[2]["x"]
            for t, img in enumerate(bench_frames(e, frames, clutter=sub == "cluttered" and light == 1)):
                name = f"ep{e:03d}_{t:02d}.png"
                Image.fromarray(img).save(root / sub / name)
                rows.append(f"{sub}/{name},{sub}_{e:03d},{x:.4f},{light}")
    if root_labels:
        (root / "labels.csv").write_text("\n".join(rows) + "\n")
    return rows


def _score_unpaired_domains(a, b, out, *, permutations):
    """`score images:A images:B --unpaired` with the small encoder at 32 px: the run and its result."""
    run = CliRunner().invoke(cli, ["score", f"images:{a}", f"images:{b}", "--unpaired", "--encoder", SMALL_ENCODER,
                                   "--image-size", "32", "--permutations", str(permutations), "--quiet",
                                   "--json", str(out)], catch_exceptions=False)
    assert run.exit_code == 0, run.output
    return run, json.loads(out.read_text())


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
    run, result = _score_unpaired_domains(a / "imgs", b / "imgs", tmp_path / "r.json", permutations=99)
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


def test_root_labels_of_an_unpaired_folder_give_groups_probes_and_a_factor_breakdown(tmp_path, one_torch_thread):
    root = tmp_path / "data"
    unpaired_root(root, 20, 2)
    out = tmp_path / "r.json"
    run = CliRunner().invoke(cli, ["score", str(root), "--encoder", SMALL_ENCODER, "--image-size", "32",
                                   "--permutations", "499", "--quiet", "--json", str(out)], catch_exceptions=False)
    assert run.exit_code == 0, run.output
    result = json.loads(out.read_text())
    assert result["pairing"] == "unpaired" and result["dataset"]["factors"] == ["factor_light"]
    # the root file's episode column: 20 episodes of 2 frames in each domain
    assert result["metrics"]["domain_classifier"]["grouping"]["groups"] == [20, 20]
    assert set(result["metrics"]["probe"]) == {"x"} and result["metrics"]["probe"]["x"]["n_test_b"] == 40
    light = result["breakdowns"]["factor_light"]
    assert light["1"]["rows"] == [20, 20] and light["1"]["groups"] == [10, 10]
    # clutter only at factor_light 1: found there, and not where both domains are clean
    assert light["1"]["metrics"]["mmd"]["p_value"] < 0.01 and light["1"]["metrics"]["domain_classifier"]["p_value"] < 0.01
    assert light["0"]["metrics"]["mmd"]["p_value"] > 0.05
    assert light["0"]["metrics"]["domain_classifier"]["p_value"] > 0.05
    assert "p_value_adjusted" in light["1"]["metrics"]["domain_classifier"]


def test_domain_labels_reads_the_root_file_for_each_sub_folder_in_image_order(tmp_path):
    root = tmp_path / "data"
    rows = unpaired_root(root, 3, 2)
    table = domain_labels(root / "cluttered", ["ep501_00.png", "ep500_01.png"])
    assert list(table.groups) == ["cluttered_501", "cluttered_500"]
    assert list(table.factors["factor_light"]) == ["1", "0"]
    expected_x = {r.split(",")[0]: float(r.split(",")[2]) for r in rows[1:]}
    assert table.tasks["x"].tolist() == [expected_x["cluttered/ep501_00.png"], expected_x["cluttered/ep500_01.png"]]
    assert table.task_kinds == {"x": "regression"}
    # a paired folder keeps its root labels.csv to itself: a sub-folder scored as a domain has none
    paired = tmp_path / "paired"
    for sub in ("clean", "cluttered"):
        (paired / sub).mkdir(parents=True)
        Image.new("RGB", (8, 8)).save(paired / sub / "a.png")
    (paired / "labels.csv").write_text("file,x\na.png,1\n")
    assert domain_labels(paired / "clean", ["a.png"]) is None


@pytest.mark.parametrize("labels, message", [
    ("file,x\nep000_00.png,1\n", "write clean/NAME or cluttered/NAME in the first column"),
    ("file,x\nclean/ep000_00.png,1\n", "has no row for 3 images: clean/ep000_01.png, cluttered/ep500_00.png"),
])
def test_root_labels_keyed_otherwise_are_refused_naming_the_file_and_the_fix(tmp_path, labels, message):
    root = tmp_path / "data"
    unpaired_root(root, 1, 2, root_labels=False)
    (root / "labels.csv").write_text(labels)
    with pytest.raises(InvarianceError, match=message.replace(".", r"\.")) as caught:
        domain_labels(root / "clean", ["ep000_00.png", "ep000_01.png"])
    assert str(root / "labels.csv") in str(caught.value)


def test_labels_in_the_root_and_in_a_sub_folder_at_once_are_refused_before_any_work(tmp_path):
    root = tmp_path / "data"
    unpaired_root(root, 6, 2)
    (root / "clean" / "labels.csv").write_text("file,x\n" + "".join(f"ep{e:03d}_{t:02d}.png,1\n"
                                                                     for e in range(6) for t in range(2)))
    out = tmp_path / "r.json"
    run = CliRunner().invoke(cli, ["score", str(root), "--encoder", SMALL_ENCODER, "--image-size", "32",
                                   "--quiet", "--json", str(out)])
    assert run.exit_code == 1 and not out.exists()
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and "are given twice" in lines[0] and "keep one" in lines[0]


def test_a_factor_in_one_sub_folder_labels_only_is_named_in_breakdowns_skipped(tmp_path, one_torch_thread):
    a, b = tmp_path / "a", tmp_path / "b"
    _folder(a, "imgs", 10, 2, clutter=False, first=0)
    _folder(b, "imgs", 10, 2, clutter=True, first=300)
    labels = (b / "imgs" / "labels.csv").read_text().splitlines()
    (b / "imgs" / "labels.csv").write_text("\n".join([labels[0] + ",factor_lighting"]
                                                     + [row + ",3" for row in labels[1:]]) + "\n")
    run, result = _score_unpaired_domains(a / "imgs", b / "imgs", tmp_path / "r.json", permutations=20)
    assert result["breakdowns"] == {}
    assert result["breakdowns_skipped"] == [{"column": "factor_lighting", "labelled_in": "B", "reason": (
        "labelled in domain B only: a breakdown compares the two domains' rows at the same value, so domain A's "
        "rows need this column too")}]
    assert "breakdown factor_lighting not tested" in run.stdout
