"""`invariance compare` on unpaired domains: two DATA arguments, --unpaired, an unpaired folder."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image

from invariance.cli import cli
from invariance.options import ExtractionOptions, ScoringOptions
from invariance.scoring import score_unpaired_features

from test_sources_hdf5 import SMALL_ENCODER
from test_unpaired import episodes
from test_unpaired_folders import _folder, unpaired_root

OTHER_ENCODER = "python:invariance.zoo:clutter_augmented_encoder"
FAST = ["--image-size", "32", "--permutations", "99", "--no-cache"]


def _invoke(*args):
    return CliRunner().invoke(cli, ["compare", *map(str, args)])


def test_two_unpaired_image_domains_are_ranked_reported_and_match_the_library(tmp_path, one_torch_thread):
    from invariance.pipeline import compare_encoders
    from invariance.sources import SourceOptions

    a, b = tmp_path / "a", tmp_path / "b"
    _folder(a, "imgs", 10, 2, clutter=False, first=0)
    _folder(b, "imgs", 10, 2, clutter=True, first=300)
    out, report = tmp_path / "c.json", tmp_path / "c.html"
    run = _invoke(f"images:{a / 'imgs'}", f"images:{b / 'imgs'}", "--unpaired", "--encoder", SMALL_ENCODER,
                  "--encoder", OTHER_ENCODER, *FAST, "--quiet", "--json", out, "--report", report)
    assert run.exit_code == 0, run.output
    comparison = json.loads(out.read_text())
    results = comparison["results"]
    assert [r["encoder"]["spec"] for r in results] == [SMALL_ENCODER, OTHER_ENCODER]
    assert all(r["pairing"] == "unpaired" and "paired_drift" in r["not_computed"] for r in results)
    # the labels' "part" is not decodable by either encoder: the ranking falls back to domain
    # accuracy, lowest first, and says that this cannot tell a blind encoder from a robust one
    assert "ranked by invariance (no task labels)" in run.stdout
    assert "cannot tell a blind encoder from a robust one" in run.stdout
    ranked = [line.split()[1] for line in run.stdout.splitlines() if line[:1].isdigit()]
    accuracy = {r["encoder"]["spec"]: r["metrics"]["domain_classifier"]["accuracy"] for r in results}
    assert accuracy[ranked[0]] <= accuracy[ranked[1]]
    html = report.read_text()
    assert SMALL_ENCODER in html and OTHER_ENCODER in html
    # a thin shell: the same numbers as the library's compare_encoders on the same domains
    direct = compare_encoders(f"images:{a / 'imgs'}", [SMALL_ENCODER, OTHER_ENCODER], data_b=f"images:{b / 'imgs'}",
                              sources=SourceOptions(unpaired=True), extraction=ExtractionOptions(image_size=32),
                              scoring=ScoringOptions(permutations=99), progress=False)
    for mine, theirs in zip(results, direct["results"]):
        assert mine["metrics"]["domain_classifier"] == theirs["metrics"]["domain_classifier"]
        assert mine["metrics"]["mmd"] == theirs["metrics"]["mmd"]


def test_one_unpaired_folder_is_announced_and_broken_down_by_its_root_labels(tmp_path, one_torch_thread):
    root = tmp_path / "data"
    unpaired_root(root, 20, 2)
    out, report = tmp_path / "c.json", tmp_path / "c.html"
    run = _invoke(root, "--encoder", SMALL_ENCODER, "--encoder", OTHER_ENCODER, *FAST, "--json", out,
                  "--report", report)
    assert run.exit_code == 0, run.output
    assert "clean/ and cluttered/ share no file name; comparing them as unpaired domains" in run.stderr
    for result in json.loads(out.read_text())["results"]:
        assert result["metrics"]["domain_classifier"]["grouping"]["groups"] == [20, 20]
        light = result["breakdowns"]["factor_light"]
        assert light["0"]["rows"] == light["1"]["rows"] == [20, 20]
        assert "p_value_adjusted" in light["1"]["metrics"]["mmd"]
    assert "factor_light" in report.read_text()


def test_one_paired_folder_with_unpaired_flag_is_compared_as_two_domains(tmp_path, one_torch_thread):
    root = tmp_path / "data"
    for sub, clutter in (("clean", False), ("cluttered", True)):
        _folder(root, sub, 10, 1, clutter=clutter, first=0)  # the same names: a paired layout
    out = tmp_path / "c.json"
    run = _invoke(root, "--unpaired", "--encoder", SMALL_ENCODER, *FAST, "--json", out)
    assert run.exit_code == 0, run.output
    assert "comparing clean/ and cluttered/ as unpaired domains (--unpaired)" in run.stderr
    result = json.loads(out.read_text())["results"][0]
    assert result["pairing"] == "unpaired" and result["dataset"]["frames"] == [10, 10]


def test_ranking_by_task_information_holds_for_unpaired_results():
    # Two encoders of the same unpaired domains: one keeps the task in B, one loses it there
    # (its B features carry only noise in the task's dimensions). The ranking must use the
    # probes' skill on B (trained on A) and put the first ahead with a clear interval.
    from invariance.verdict import TASK_BASIS, rank

    rng = np.random.default_rng(21)
    a, ga = episodes(30, 4, 6, rng, episode_sd=1.0)
    b, gb = episodes(30, 4, 6, rng, episode_sd=1.0)
    w = np.r_[np.ones(3), np.zeros(3)]
    ya, yb = a @ w, b @ w
    lost = b.copy()
    lost[:, :3] = rng.standard_normal((b.shape[0], 3))
    options = ScoringOptions(permutations=20)
    results = []
    for name, features_b in (("loses", lost), ("keeps", b)):
        scored = score_unpaired_features(a, features_b, groups_a=ga, groups_b=gb, tasks_a={"y": ya},
                                         tasks_b={"y": yb}, options=options)
        results.append({**scored, "encoder": {"spec": name, "name": name}, "dataset": {"pairs": 0}})
    ranking = rank(results)
    assert ranking.basis == TASK_BASIS and ranking.carried == ["y"]
    assert [results[i]["encoder"]["name"] for i in ranking.order] == ["keeps", "loses"]
    assert ranking.ranks == {1: 1, 0: 2}


@pytest.mark.parametrize("args, message", [
    (["x", "y", "z"], "give one data folder or two domains"),
    (["hdf5:demos.h5#frames=data/*/img"], "names one source; give two domains"),
    (["{paired}", "--stride", "2"], "apply to two domains"),
    (["{manifest}", "--unpaired"], "has no clean/ and cluttered/ folders"),
    (["--features-dir", "{paired}", "--unpaired"], "apply to DATA, not to --features-dir"),
])
def test_bad_data_arguments_are_usage_errors(tmp_path, args, message):
    paired, manifest = tmp_path / "paired", tmp_path / "pairs.csv"
    for sub in ("clean", "cluttered"):
        (paired / sub).mkdir(parents=True)
        Image.new("RGB", (8, 8)).save(paired / sub / "a.png")
    manifest.write_text("clean,cluttered\npaired/clean/a.png,paired/cluttered/a.png\n")
    args = [a.format(paired=paired, manifest=manifest) for a in args]
    encoder = [] if "--features-dir" in args else ["--encoder", SMALL_ENCODER]
    run = _invoke(*args, *encoder)
    assert run.exit_code == 2 and message in run.stderr, run.output


def test_domains_sharing_some_names_stop_before_any_encoder_and_write_nothing(tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    _folder(a, "imgs", 6, 2, clutter=False, first=0)
    _folder(b, "imgs", 6, 2, clutter=True, first=3)  # episodes 3-5 in both, 0-2 and 6-8 in one
    out = tmp_path / "c.json"
    # the encoder does not exist: were it loaded first, the message would be about it
    run = _invoke(f"images:{a / 'imgs'}", f"images:{b / 'imgs'}", "--encoder", "python:invariance.zoo:no_such",
                  "--json", out)
    assert run.exit_code == 1 and not out.exists()
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and "are in one domain only" in lines[0] and "--unpaired" in lines[0]


def test_too_few_groups_stop_before_any_encoder_and_write_nothing(tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    _folder(a, "imgs", 3, 4, clutter=False, first=0)  # 12 images in 3 episodes: 5 folds need 5
    _folder(b, "imgs", 8, 2, clutter=True, first=100)
    out = tmp_path / "c.json"
    run = _invoke(f"images:{a / 'imgs'}", f"images:{b / 'imgs'}", "--unpaired", "--encoder",
                  "python:invariance.zoo:no_such", "--json", out)
    assert run.exit_code == 1 and not out.exists()
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and "domain A has 12 rows in 3 groups; need at least 10 rows and 5 groups" in lines[0]


def test_a_stride_longer_than_an_image_domain_is_refused_before_any_encoder_loads(tmp_path, monkeypatch):
    """Each image of an image folder is one frame, so --stride 2 keeps nothing of it: the
    command says so before loading an encoder (common practice: fail before the slow work)."""
    from PIL import Image

    import invariance.encoders as encoders

    for domain in ("a", "b"):
        (tmp_path / domain).mkdir()
        for i in range(3):
            Image.new("RGB", (32, 32), (i * 40, 0, 0)).save(tmp_path / domain / f"img_{domain}{i}.png")

    def refuse(*args, **kwargs):
        raise AssertionError("the encoder was loaded")

    monkeypatch.setattr(encoders, "load_encoder", refuse)
    res = CliRunner().invoke(cli, ["compare", f"images:{tmp_path / 'a'}", f"images:{tmp_path / 'b'}", "--unpaired",
                                   "--stride", "2", "--encoder", "python:invariance.zoo:clean_only_encoder",
                                   "--json", str(tmp_path / "out.json")])
    assert res.exit_code == 1, res.output
    assert "fewer than the stride 2" in res.output and "one frame" in res.output
    assert not (tmp_path / "out.json").exists()
