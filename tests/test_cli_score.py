"""`invariance score --features`: outputs, gates and exit codes (docs/design.md, command-line contract)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner

from invariance import SAFETY_CAUTION
from invariance.cli import cli


def _features(tmp_path, shift=0.0, n=120, d=24, seed=0):
    rng = np.random.default_rng(seed)
    scene = rng.normal(size=(n, d))
    clean = scene + 0.3 * rng.normal(size=(n, d))
    cluttered = scene + 0.3 * rng.normal(size=(n, d)) + shift
    a, b = tmp_path / "clean.npy", tmp_path / "cluttered.npy"
    np.save(a, clean.astype(np.float32))
    np.save(b, cluttered.astype(np.float32))
    return a, b


def _labels(tmp_path, n=120):
    rows = ["file,part,x,level"] + [f"s{i},{'nut' if i % 2 else 'bolt'},{i / n:.3f},{1 + i % 3}" for i in range(n)]
    path = tmp_path / "labels.csv"
    path.write_text("\n".join(rows) + "\n")
    return path


def _run(args):
    return CliRunner().invoke(cli, args, catch_exceptions=False)


# The statistics themselves are checked against outside references in test_metrics_*.py
# and test_scoring.py; here the command-line contract of docs/design.md (keys, gates, exit codes).


def test_features_json_has_the_design_keys(tmp_path):
    a, b = _features(tmp_path, shift=0.8)
    out = tmp_path / "r.json"
    res = _run(["score", "--features", str(a), str(b), "--labels", str(_labels(tmp_path)), "--json", str(out),
                "--permutations", "200"])
    assert res.exit_code == 0, res.output
    result = json.loads(out.read_text())
    assert result["schema"] == "invariance.result/1"
    m = result["metrics"]
    for key in ("accuracy", "ci", "proxy_a_distance", "p_value"):
        assert key in m["domain_classifier"]
    for key in ("mmd2", "p_value", "permutations", "bandwidth"):
        assert key in m["mmd"]
    assert m["mmd"]["permutations"] == 200
    assert set(m["probe"]) == {"part", "x"}  # level is a breakdown column, not a probe
    assert m["probe"]["part"]["kind"] == "classification" and m["probe"]["x"]["kind"] == "regression"
    assert {"relative_drift", "pair_retrieval_top1"} <= set(m["paired_drift"])
    assert isinstance(m["cka"], float)
    assert set(result["breakdowns"]["level"]) == {"1", "2", "3"}
    assert result["dataset"]["pairs"] == 120
    # a shift of 0.8 per dimension is plainly visible
    assert m["domain_classifier"]["accuracy"] > 0.8 and m["mmd"]["p_value"] < 0.05
    assert SAFETY_CAUTION in res.output


def test_same_inputs_and_seed_give_identical_json(tmp_path):
    a, b = _features(tmp_path, shift=0.2)
    outs = []
    for i in range(2):
        out = tmp_path / f"r{i}.json"
        assert _run(["score", "--features", str(a), str(b), "--json", str(out), "--seed", "5",
                     "--permutations", "100"]).exit_code == 0
        result = json.loads(out.read_text())
        result["environment"].pop("timings_s")
        outs.append(result)
    assert outs[0] == outs[1]


def test_gate_failure_exits_3_and_names_the_gate(tmp_path):
    a, b = _features(tmp_path, shift=1.0)
    out = tmp_path / "r.json"
    res = _run(["score", "--features", str(a), str(b), "--json", str(out), "--permutations", "50",
                "--max-domain-accuracy", "0.6", "--max-relative-drift", "100"])
    assert res.exit_code == 3
    assert "gate not met: max_domain_accuracy" in res.output
    assert "max_relative_drift" not in res.output.split("gate not met:")[1]
    gates = json.loads(out.read_text())["gates"]  # the JSON is still written, with the verdict
    assert gates["max_domain_accuracy"]["passed"] is False and gates["max_relative_drift"]["passed"] is True


def test_gates_met_exit_0(tmp_path):
    a, b = _features(tmp_path, shift=0.0)
    res = _run(["score", "--features", str(a), str(b), "--permutations", "50", "--max-domain-accuracy", "0.95"])
    assert res.exit_code == 0, res.output


def test_drift_csv_lists_every_pair(tmp_path):
    a, b = _features(tmp_path, shift=0.3)
    csv_path = tmp_path / "drift.csv"
    assert _run(["score", "--features", str(a), str(b), "--labels", str(_labels(tmp_path)), "--drift-csv",
                 str(csv_path), "--permutations", "20"]).exit_code == 0
    lines = csv_path.read_text().splitlines()
    assert lines[0] == "file,relative_drift" and len(lines) == 121 and lines[1].startswith("s0,")


@pytest.mark.parametrize(
    "make, message",
    [
        (lambda a, b: np.save(b, np.load(a)[:-3]), "shape"),
        (lambda a, b: np.save(b, np.where(np.arange(24) == 3, np.nan, np.load(b))), "NaN"),
    ],
)
def test_bad_feature_files_exit_1_nothing_written(tmp_path, make, message):
    a, b = _features(tmp_path)
    make(a, b)
    out = tmp_path / "r.json"
    res = CliRunner().invoke(cli, ["score", "--features", str(a), str(b), "--json", str(out)])
    assert res.exit_code == 1
    assert message.lower() in res.output.lower()
    assert not out.exists()


def test_features_and_data_together_is_a_usage_error(tmp_path):
    a, b = _features(tmp_path)
    res = CliRunner().invoke(cli, ["score", str(tmp_path), "--features", str(a), str(b)])
    assert res.exit_code == 2


def test_tsne_view_is_stored_and_drawn_when_asked(tmp_path):
    a, b = _features(tmp_path, shift=0.5, n=60)
    out, html = tmp_path / "r.json", tmp_path / "r.html"
    res = _run(["score", "--features", str(a), str(b), "--json", str(out), "--report", str(html),
                "--permutations", "20", "--tsne"])
    assert res.exit_code == 0, res.output
    projection = json.loads(out.read_text())["projection"]
    assert len(projection["tsne"]["clean"]) == len(projection["clean"]) == 60
    assert "t-SNE" in html.read_text()
    plain = tmp_path / "plain.json"
    _run(["score", "--features", str(a), str(b), "--json", str(plain), "--permutations", "20"])
    assert "tsne" not in json.loads(plain.read_text())["projection"]  # only when asked: it is slow


# ----------------------------------------------------------------------- two domains (sources)


@pytest.mark.parametrize("args, needle", [
    (["a", "b", "c"], "two domains"),
    (["hdf5:x.h5#frames=data/*/img"], "names one source"),
    (["a", "b", "--stride", "0"], "--stride"),
    (["a", "b", "--label", "no-equals-sign"], "--label"),
])
def test_source_usage_errors_exit_2_naming_the_problem(args, needle):
    result = CliRunner().invoke(cli, ["score", *args, "--encoder", "torchvision:resnet18"])
    assert result.exit_code == 2 and needle in result.output


def test_a_missing_source_is_exit_1_naming_it(tmp_path):
    result = CliRunner().invoke(cli, ["score", f"hdf5:{tmp_path / 'no.h5'}#frames=d/*", f"hdf5:{tmp_path / 'no.h5'}#frames=d/*",
                                      "--encoder", "torchvision:resnet18", "--json", str(tmp_path / "r.json")])
    assert result.exit_code == 1 and "no.h5: no such file" in result.output
    assert not (tmp_path / "r.json").exists()


def test_feature_files_with_an_episode_column_are_scored_by_episode(tmp_path):
    a, b = _features(tmp_path, n=120)
    rows = ["file,episode,x"] + [f"s{i},ep{i // 6},{i / 120:.3f}" for i in range(120)]
    (tmp_path / "labels.csv").write_text("\n".join(rows) + "\n")
    out = tmp_path / "r.json"
    result = _run(["score", "--features", str(a), str(b), "--labels", str(tmp_path / "labels.csv"),
                   "--permutations", "50", "--json", str(out)])
    assert result.exit_code == 0, result.output
    data = json.loads(out.read_text())
    assert data["grouping"]["unit"] == "group" and data["grouping"]["groups"] == 20
    assert "episode" not in data["metrics"]["probe"] and "x" in data["metrics"]["probe"]


def test_unpaired_feature_files_of_different_lengths(tmp_path):
    rng = np.random.default_rng(0)
    np.save(tmp_path / "a.npy", rng.normal(size=(80, 6)))
    np.save(tmp_path / "b.npy", rng.normal(size=(50, 6)) + 1.0)
    out = tmp_path / "r.json"
    result = _run(["score", "--features", str(tmp_path / "a.npy"), str(tmp_path / "b.npy"), "--unpaired",
                   "--permutations", "50", "--json", str(out)])
    assert result.exit_code == 0, result.output
    data = json.loads(out.read_text())
    assert data["pairing"] == "unpaired" and data["dataset"]["frames"] == [80, 50]
    assert data["metrics"]["mmd"]["p_value"] < 0.05 and "cka" in data["not_computed"]


# --------------------------------------------------------------------------- images: name, warm re-score, policy


@pytest.fixture(scope="module")
def scene_set(tmp_path_factory):
    from invariance.scenes import generate_scenes

    root = tmp_path_factory.mktemp("scenes") / "set"
    generate_scenes(root, pairs=12, size=32, seed=3)
    return root


_IMAGES = ["--encoder", "python:invariance.zoo:workbench_cnn", "--image-size", "32", "--permutations", "20", "--quiet"]


def test_name_labels_the_result(tmp_path, scene_set):
    out = tmp_path / "r.json"
    res = _run(["score", str(scene_set), *_IMAGES, "--no-cache", "--name", "bench CNN", "--json", str(out)])
    assert res.exit_code == 0, res.output
    result = json.loads(out.read_text())
    assert result["encoder"]["name"] == "bench CNN" and result["caution"] == SAFETY_CAUTION


def test_a_warm_rescore_never_loads_the_encoder(tmp_path, scene_set, monkeypatch):
    # Issue "statistics calibrated at the sizes users have": a repeat is served from the
    # feature cache through the request index, without importing torch or building the model.
    from invariance import pipeline

    cache = tmp_path / "cache"
    first, second = tmp_path / "a.json", tmp_path / "b.json"
    res = _run(["score", str(scene_set), *_IMAGES, "--cache-dir", str(cache), "--json", str(first)])
    assert res.exit_code == 0, res.output

    def no_load(*args, **kwargs):
        raise AssertionError("the encoder was loaded on a warm re-score")

    monkeypatch.setattr(pipeline, "_load", no_load)
    res = _run(["score", str(scene_set), *_IMAGES, "--cache-dir", str(cache), "--json", str(second)])
    assert res.exit_code == 0, res.output
    a, b = json.loads(first.read_text()), json.loads(second.read_text())
    assert a["metrics"] == b["metrics"] and a["encoder"] == b["encoder"]
    # another image size is another request: it must load (and here, fail loudly)
    with pytest.raises(AssertionError, match="loaded on a warm re-score"):
        _run(["score", str(scene_set), *_IMAGES[:-5], "--image-size", "48", "--permutations", "20", "--quiet",
              "--cache-dir", str(cache)])


def test_output_tolerance_of_the_wrong_length_names_the_option(tmp_path, scene_set):
    out = tmp_path / "r.json"
    res = _run(["score", str(scene_set), *_IMAGES, "--no-cache", "--output-tolerance", "0.1,0.1", "--json", str(out)])
    assert res.exit_code == 1
    assert "--output-tolerance has 2 value(s) but the policy outputs" in res.output
    assert not out.exists()


def test_output_tolerance_reports_output_drift_with_the_caution(tmp_path, scene_set):
    # The workbench CNN's pooled output is its "policy output" here (128 numbers per image);
    # the per-dimension figures are checked against numpy in tests/test_output_drift.py.
    out = tmp_path / "r.json"
    res = _run(["score", str(scene_set), *_IMAGES, "--no-cache", "--output-tolerance", ",".join(["0.05"] * 128),
                "--json", str(out)])
    assert res.exit_code == 0, res.output
    drift = json.loads(out.read_text())["output_drift"]
    assert drift["dimensions"] == 128 and drift["pairs"] == 12
    assert SAFETY_CAUTION.split(".")[0] in res.output


def test_a_features_directory_scores_like_the_images_it_came_from(tmp_path, scene_set):
    # `invariance extract` on one machine, `score --features-dir` on another: same statistics.
    feats, a, b = tmp_path / "feats", tmp_path / "a.json", tmp_path / "b.json"
    res = _run(["extract", str(scene_set), "--encoder", "python:invariance.zoo:workbench_cnn", "--image-size", "32",
                "--out", str(feats), "--quiet"])
    assert res.exit_code == 0, res.output
    res = _run(["score", "--features-dir", str(feats), "--labels", str(scene_set / "labels.csv"),
                "--permutations", "20", "--quiet", "--json", str(a)])
    assert res.exit_code == 0, res.output
    res = _run(["score", str(scene_set), *_IMAGES, "--no-cache", "--json", str(b)])
    assert res.exit_code == 0, res.output
    assert json.loads(a.read_text())["metrics"] == json.loads(b.read_text())["metrics"]
    res = _run(["score", "--features-dir", str(feats), "--encoder", "torchvision:resnet18", "--quiet"])
    assert res.exit_code == 1 and "not of encoder 'torchvision:resnet18'" in res.output


def test_explain_worst_stores_drift_maps_and_the_report_overlays_them(tmp_path, scene_set):
    from invariance.data import discover_pairs
    from invariance.encoders import load_encoder
    from invariance.explain import occlusion_map

    out, report = tmp_path / "r.json", tmp_path / "r.html"
    res = _run(["score", str(scene_set), *_IMAGES, "--no-cache", "--explain-worst", "2", "--json", str(out),
                "--report", str(report)])
    assert res.exit_code == 0, res.output
    result = json.loads(out.read_text())
    maps = result["drift_maps"]
    assert maps["method"] == "occlusion" and len(maps["pairs"]) == 2
    worst = sorted(result["pairs"], key=lambda p: -p["drift"])[:2]
    assert [p["name"] for p in maps["pairs"]] == [p["name"] for p in worst]  # the pairs that drift most
    # the stored drops are those of the occlusion map computed directly on that pair
    pairs = discover_pairs(scene_set)
    index = list(pairs.names).index(maps["pairs"][0]["name"])
    encoder = load_encoder("python:invariance.zoo:workbench_cnn", device="cpu", image_size=32)
    from PIL import Image

    views = [Image.open(path).convert("RGB") for path in (pairs.clean[index], pairs.cluttered[index])]
    direct = occlusion_map(encoder, *views, patch=maps["patch"])
    np.testing.assert_allclose(maps["pairs"][0]["drops"], direct["drops"], rtol=1e-4, atol=1e-6)
    assert report.read_text().count('alt="drift map of') == 2
    res = _run(["score", "--features", str(tmp_path / "x.npy"), str(tmp_path / "y.npy"), "--explain-worst", "2"])
    assert res.exit_code == 2 and "--explain-worst needs paired images" in res.output


def test_compare_ranks_features_directories_like_the_scores_of_each(tmp_path, scene_set):
    dirs = []
    for spec in ("python:invariance.zoo:workbench_cnn", "python:invariance.zoo:clean_only_encoder"):
        folder = tmp_path / spec.rsplit(":", 1)[1]
        res = _run(["extract", str(scene_set), "--encoder", spec, "--image-size", "32", "--out", str(folder), "--quiet"])
        assert res.exit_code == 0, res.output
        dirs += ["--features-dir", str(folder)]
    out, single = tmp_path / "cmp.json", tmp_path / "one.json"
    res = _run(["compare", *dirs, "--labels", str(scene_set / "labels.csv"), "--permutations", "20", "--quiet",
                "--name", "untrained", "--name", "clean-only", "--json", str(out)])
    assert res.exit_code == 0, res.output
    comparison = json.loads(out.read_text())
    assert [r["encoder"]["name"] for r in comparison["results"]] == ["untrained", "clean-only"]
    res = _run(["score", "--features-dir", dirs[1], "--labels", str(scene_set / "labels.csv"), "--permutations", "20",
                "--quiet", "--json", str(single)])
    assert comparison["results"][0]["metrics"] == json.loads(single.read_text())["metrics"]
    res = _run(["compare", str(scene_set), *dirs])
    assert res.exit_code == 2 and "--features-dir replaces DATA" in res.output


# --------------------------------------------------------------- domain options (shared with compare)

NO_ENCODER = "python:invariance.zoo:no_such"  # were it loaded, the run would end with exit 1 naming it


def _paired_folder(root):
    from PIL import Image

    for sub in ("clean", "cluttered"):
        (root / sub).mkdir(parents=True)
        Image.new("RGB", (8, 8)).save(root / sub / "a.png")
    (root / "labels.csv").write_text("file,x\na.png,1\n")
    return root


@pytest.mark.parametrize("flag", [["--stride", "2"], ["--max-frames-per-episode", "3"], ["--label", "x=data/x"]])
def test_frame_options_on_a_paired_folder_are_usage_errors_before_any_work(tmp_path, flag):
    # A paired folder scores every pair: before, these options were accepted and ignored.
    root = _paired_folder(tmp_path / "d")
    out = tmp_path / "r.json"
    res = CliRunner().invoke(cli, ["score", str(root), *flag, "--encoder", NO_ENCODER, "--json", str(out)])
    assert res.exit_code == 2 and "apply to two domains" in res.stderr and flag[0] in res.stderr, res.output
    assert not out.exists()


@pytest.mark.parametrize("args, message", [
    (["--features", "{a}", "{b}", "--stride", "2"], "do not apply to --features"),
    (["--features-dir", "{root}", "--unpaired"], "apply to DATA, not to --features-dir"),
    (["--features-dir", "{root}", "--explain-worst", "2"], "not --features-dir"),
    (["{root}", "--encoder", NO_ENCODER, "--unpaired", "--explain-worst", "2"], "--explain-worst needs paired"),
])
def test_options_that_would_be_ignored_are_usage_errors(tmp_path, args, message):
    a, b = _features(tmp_path)
    root = _paired_folder(tmp_path / "d")
    res = CliRunner().invoke(cli, ["score", *(x.format(a=a, b=b, root=root) for x in args)])
    assert res.exit_code == 2 and message in res.stderr, res.output


def test_outputs_over_the_labels_of_unpaired_image_domains_are_refused_before_any_work(tmp_path):
    from test_unpaired_folders import _folder, unpaired_root

    root = tmp_path / "data"
    unpaired_root(root, 6, 2)
    a, b = tmp_path / "a", tmp_path / "b"
    _folder(a, "imgs", 6, 2, clutter=False, first=0)
    _folder(b, "imgs", 6, 2, clutter=True, first=100)
    cases = [([root], root / "labels.csv"),  # the root labels.csv of one unpaired folder
             ([root, "--unpaired"], root / "labels.csv"),
             ([f"images:{a / 'imgs'}", f"images:{b / 'imgs'}"], b / "imgs" / "labels.csv")]
    for data, target in cases:
        before = target.read_bytes()
        res = CliRunner().invoke(cli, ["score", *map(str, data), "--encoder", NO_ENCODER, "--json", str(target)])
        assert res.exit_code == 1 and "is read by this run" in res.stderr, (data, res.output)
        assert len(res.stderr.strip().splitlines()) == 1 and target.read_bytes() == before


def test_too_few_groups_stop_before_the_encoder_loads(tmp_path):
    from test_unpaired_folders import _folder

    a, b = tmp_path / "a", tmp_path / "b"
    _folder(a, "imgs", 3, 4, clutter=False, first=0)  # 12 images in 3 episodes: 5 folds need 5 groups
    _folder(b, "imgs", 8, 2, clutter=True, first=100)
    out = tmp_path / "r.json"
    res = CliRunner().invoke(cli, ["score", f"images:{a / 'imgs'}", f"images:{b / 'imgs'}", "--unpaired",
                                   "--encoder", NO_ENCODER, "--json", str(out)])
    assert res.exit_code == 1 and not out.exists()
    assert "domain A has 12 rows in 3 groups; need at least 10 rows and 5 groups" in res.stderr


@pytest.mark.parametrize("flag, encoder, message", [
    (["--label", "x=data/x"], NO_ENCODER, "an image folder takes its labels from labels.csv"),
    (["--stride", "2"], "python:invariance.zoo:clean_only_encoder", "fewer than the stride 2"),
])
def test_frame_options_reach_the_domains_of_an_unpaired_folder(tmp_path, flag, encoder, message):
    # Before, an unpaired folder went through score_dataset, which dropped the source options:
    # both were accepted and ignored. An image is one frame of its own, so both are refused by
    # the image folder source, the label before the encoder loads.
    from test_unpaired_folders import unpaired_root

    root = tmp_path / "data"
    unpaired_root(root, 5, 2)
    out = tmp_path / "r.json"
    res = CliRunner().invoke(cli, ["score", str(root), *flag, "--encoder", encoder, "--image-size", "32",
                                   "--quiet", "--no-cache", "--json", str(out)])
    assert res.exit_code == 1 and message in res.stderr and "no_such" not in res.stderr, res.output
    assert not out.exists()
