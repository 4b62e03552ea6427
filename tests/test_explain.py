"""Drift maps: occlusion sensitivity, gradient times input, mask shares, overlays, `invariance explain`."""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
from click.testing import CliRunner
from PIL import Image
from scipy.spatial.distance import cosine

from invariance.cli import cli
from invariance.encoders import Encoder, Preprocess, extract_features, load_encoder
from invariance.errors import InvalidParameter, InvarianceError
from invariance.explain import (explain_pairs, gradient_map, occlusion_map, overlay_rgb, positive_mass_shares,
                                spread_drops)
from invariance.explain._common import _preprocess, _to_tensor
from invariance.explain.occlusion import _grid, _RestoredBatches, _spread, default_patch
from invariance.data import discover_pairs
from invariance.metrics.drift import paired_drift
from invariance.scenes import FACTORS, clutter_masks, generate_scenes, pair_rng, render_pair

CLEAN_ONLY = "python:invariance.zoo:clean_only_encoder"


@pytest.fixture(scope="module")
def encoder(one_torch_thread):
    return load_encoder(CLEAN_ONLY, device="cpu")


@pytest.fixture(scope="module")
def scene_set(tmp_path_factory):
    """Eight distractors-only pairs at 128 px, seed 4."""
    return generate_scenes(tmp_path_factory.mktemp("explain") / "s", pairs=8, size=128, seed=4,
                           factors=("distractors",))


def _pair(seed, index, size=128, factors=FACTORS, level=None):
    clean, cluttered, labels = render_pair(pair_rng(seed, index), size, factors, level)
    return clean, cluttered, {f: labels[f"factor_{f}"] for f in FACTORS}


# ------------------------------------------------------------------ occlusion


def _one_at_a_time(encoder, clean, cluttered, patch, preprocess):
    """Each patch's drop d(cluttered) - d(restored), every image run alone through the encoder
    and 1 - cos taken by scipy.spatial.distance.cosine: the definition of occlusion
    sensitivity (Zeiler & Fergus, ECCV 2014, sec. 4.2) with the clean view as occluder."""

    def feature(arr):
        with torch.inference_mode():
            return encoder(preprocess(arr)).numpy()[0].astype(np.float64)

    ref = feature(clean)
    base = cosine(feature(cluttered), ref)
    drops = []
    for rows, cols in _grid(*clean.shape[:2], patch):
        restored = cluttered.copy()
        restored[rows, cols] = clean[rows, cols]
        drops.append(base - cosine(feature(restored), ref))
    return base, np.array(drops)


def test_occlusion_drops_match_one_image_at_a_time(encoder):
    """Batched, linear-map preprocessing gives the drops of running each restored image alone
    (through the same torch preprocessing: to float rounding), and those of feature
    extraction's Pillow preprocessing to within its 8-bit rounding (measured: 1% of the
    largest drop). A 72 px image with a 32 px patch checks the narrower last row and column."""
    clean, cluttered, _ = _pair(3, 1, size=72, level=3)
    result = occlusion_map(encoder, clean, cluttered, patch=32, batch_size=4)
    base, expected = _one_at_a_time(encoder, clean, cluttered, 32,
                                    lambda a: _preprocess(encoder.preprocess, _to_tensor(a, "cpu")))
    assert result["drops"].shape == (3, 3)
    np.testing.assert_allclose(result["drops"].ravel(), expected, atol=2e-6)
    assert result["drift"] == pytest.approx(base, abs=2e-6)
    _, pillow = _one_at_a_time(encoder, clean, cluttered, 32, lambda a: encoder.preprocess(Image.fromarray(a))[None])
    np.testing.assert_allclose(result["drops"].ravel(), pillow, atol=0.02 * np.abs(pillow).max())
    # the map shares each drop evenly over its patch: it sums to the drops
    assert result["map"].sum() == pytest.approx(expected.sum(), abs=1e-5)
    assert result["map"][70, 70] == pytest.approx(expected[-1] / (8 * 8), abs=1e-7)
    # the per-pixel map is rebuilt from the 3 x 3 drops alone (what a result JSON would store)
    np.testing.assert_array_equal(spread_drops(result["drops"].tolist(), 32, 72, 72), result["map"])
    with pytest.raises(InvarianceError, match="do not fit"):
        spread_drops(result["drops"], 16, 72, 72)


def test_linear_preprocessing_equals_preprocessing_each_image():
    """Restoring a box adds R_h (clean - cluttered) R_w^T / std to the preprocessed cluttered
    view: equal to resizing, cropping and normalising the restored image (float rounding),
    for non-square images, a crop margin and every interpolation."""
    clean, cluttered, _ = _pair(0, 1, size=128, level=3)
    clean, cluttered = clean[:72, :100], cluttered[:72, :100]
    boxes = _grid(72, 100, 16)[:9]
    for interpolation in ("bilinear", "bicubic", "nearest"):
        for resize, crop in ((64, 64), (80, 48)):
            pre = Preprocess(resize, crop, interpolation=interpolation)
            built = _RestoredBatches(pre, _to_tensor(clean, "cpu"), _to_tensor(cluttered, "cpu"))(boxes)
            for j, (rows, cols) in enumerate(boxes):
                restored = cluttered.copy()
                restored[rows, cols] = clean[rows, cols]
                direct = _preprocess(pre, _to_tensor(restored, "cpu"))[0]
                assert float((built[j] - direct).abs().max()) < 1e-5


def test_unchanged_patches_cost_nothing_and_drop_nothing(encoder):
    """A patch whose pixels agree in both views cannot change the input: drop exactly 0, no pass."""
    clean, cluttered, _ = _pair(6, 2, factors=("distractors",), level=1)
    result = occlusion_map(encoder, clean, cluttered, patch=16)
    changed = np.array([not np.array_equal(clean[b], cluttered[b]) for b in _grid(128, 128, 16)])
    assert 0 < changed.sum() < 64
    assert result["forward_images"] == 2 + changed.sum()
    assert (result["drops"].ravel()[~changed] == 0).all()


# ------------------------------------------------------------------ gradient


def _tiny_encoder():
    """A smooth 16 px encoder (linear map then tanh), so a finite difference is accurate."""
    torch.manual_seed(0)
    module = torch.nn.Sequential(torch.nn.Flatten(1), torch.nn.Linear(3 * 16 * 16, 8), torch.nn.Tanh()).eval()
    return Encoder(spec="test:tiny", module=module, preprocess=Preprocess(16, 16, (0.5,) * 3, (0.25,) * 3),
                   weights_sha256=None, arch=None, device=torch.device("cpu"))


def test_gradient_map_sums_to_the_directional_derivative():
    """Sum of gradient x (cluttered - clean) is the derivative of the drift along the clutter
    direction at the cluttered view; checked by a central difference (Nocedal & Wright,
    Numerical Optimization, 2nd ed. 2006, sec. 8.1)."""
    enc = _tiny_encoder()
    clean, cluttered, _ = _pair(2, 0, size=32, level=2)
    result = gradient_map(enc, clean, cluttered)
    x0, x1 = (torch.from_numpy(a.transpose(2, 0, 1)).double()[None] / 255.0 for a in (clean, cluttered))
    module = enc.module.double()
    prep = lambda x: torch.nn.functional.interpolate(x, size=16, mode="bilinear", antialias=True,  # noqa: E731
                                                     align_corners=False).sub(0.5).div(0.25)
    ref = module(prep(x0))

    def drift(t):
        return 1.0 - torch.nn.functional.cosine_similarity(module(prep(x1 + t * (x1 - x0))), ref).item()

    h = 1e-4
    derivative = (drift(h) - drift(-h)) / (2 * h)
    assert result["map"].shape == (32, 32)
    assert result["map"].sum() == pytest.approx(derivative, rel=1e-3, abs=1e-7)
    assert result["drift"] == pytest.approx(drift(0.0), abs=1e-5)


# ------------------------------------------------------------------ shares and overlay


def test_positive_mass_shares_worked_example():
    """Worked by hand: positive mass 1 + 3 = 4; the mask holds 1 of it and the negative cell."""
    drift_map = np.array([[1.0, -2.0], [3.0, 0.0]])
    shares = positive_mass_shares(drift_map, {"a": np.array([[True, True], [False, False]]),
                                              "none": np.zeros((2, 2), bool)})
    assert shares == {"a": 0.25, "none": 0.0}
    assert positive_mass_shares(-np.ones((2, 2)), {"a": np.ones((2, 2), bool)}) == {"a": None}
    with pytest.raises(InvarianceError, match="mask 'a'"):
        positive_mass_shares(drift_map, {"a": np.ones((3, 3), bool)})


def test_overlay_colours_positive_red_negative_blue_zero_grey():
    image = np.full((4, 4, 3), 128, dtype=np.uint8)
    drift_map = np.zeros((4, 4))
    drift_map[0, 0], drift_map[3, 3] = 1.0, -1.0
    out = overlay_rgb(image, drift_map, scale=1.0)
    assert out.dtype == np.uint8 and out.shape == (4, 4, 3)
    assert out[0, 0, 0] > out[0, 0, 2] + 60
    assert out[3, 3, 2] > out[3, 3, 0] + 60
    assert out[1, 1, 0] == out[1, 1, 1] == out[1, 1, 2]
    with pytest.raises(InvarianceError, match="size"):
        overlay_rgb(image, np.zeros((3, 3)))


# ------------------------------------------------------------------ the acceptance figure


def _grid_ceiling(mask, patch):
    """Share of a map that puts every patch's mass in proportion to its distractor pixels:
    the most a map spread evenly over patches can put on the distractors."""
    boxes = _grid(*mask.shape, patch)
    counts = np.array([mask[b].sum() for b in boxes], dtype=float)
    return positive_mass_shares(_spread(counts, boxes, mask.shape), {"d": mask})["d"]


def test_maps_put_the_drift_on_the_distractors(encoder, capsys):
    """Distractors-only scenes, clean-only demo CNN: the share of positive map mass on the
    generator's distractor pixels (issue target: at least 0.6). Measured on 12 pairs (seed 5):
    occlusion with the default grid (8 px at 128 px) 0.66 (ceiling 0.64); occlusion 16 px 0.44
    against a grid ceiling of 0.43 (a 16 px patch is mostly bench around a ~20 px part, so no
    16 px map can reach 0.6: why the default grid is 16 x 16 patches, not 8 x 8); gradient x
    input 0.97."""
    assert default_patch(128, 128) == 8
    shares = {"occlusion 16 px": [], "ceiling 16 px": [], "occlusion default": [], "gradient": []}
    for i in range(12):
        clean, cluttered, severity = _pair(5, i, factors=("distractors",))
        mask = clutter_masks(5, i, 128, severity)["distractors"]
        for key, patch in (("occlusion 16 px", 16), ("occlusion default", None)):
            result = occlusion_map(encoder, clean, cluttered, patch=patch)
            shares[key].append(positive_mass_shares(result["map"], {"d": mask})["d"])
        shares["ceiling 16 px"].append(_grid_ceiling(mask, 16))
        gradient = gradient_map(encoder, clean, cluttered)["map"]
        shares["gradient"].append(positive_mass_shares(gradient, {"d": mask})["d"])
    mean = {k: float(np.mean(v)) for k, v in shares.items()}
    with capsys.disabled():
        print("\nshare of positive drift-map mass on distractor pixels:",
              ", ".join(f"{k} {v:.3f}" for k, v in mean.items()))
    assert mean["occlusion default"] >= 0.6
    assert mean["gradient"] >= 0.6
    # at 16 px the map is as concentrated on the distractors as the grid allows
    assert mean["occlusion 16 px"] >= 0.9 * mean["ceiling 16 px"]


# ------------------------------------------------------------------ data sets and the command


def test_worst_pairs_are_the_highest_relative_drift(encoder, scene_set):
    """--worst K explains the K pairs that paired_drift ranks highest, highest first."""
    pairs = discover_pairs(scene_set)
    clean, cluttered = extract_features(pairs, encoder, progress=False)["output"]
    per_pair = paired_drift(clean, cluttered, resamples=100)["per_pair"]
    explained = explain_pairs(pairs, encoder, worst=3, method="gradient", progress=False)
    names = [e["name"] for e in explained["pairs"]]
    assert names == [pairs.names[i] for i in np.argsort(-per_pair)[:3]]
    assert [e["relative_drift"] for e in explained["pairs"]] == pytest.approx(np.sort(per_pair)[::-1][:3])
    assert all(e["shares"] is None for e in explained["pairs"])
    with pytest.raises(InvalidParameter):
        explain_pairs(pairs, encoder, names=["scene_00000.png"], worst=2)


def _run(args):
    return CliRunner().invoke(cli, args, catch_exceptions=False)


def test_explain_command_writes_figures_maps_and_summary(encoder, scene_set, tmp_path):
    out = tmp_path / "maps"
    res = _run(["explain", str(scene_set), "--encoder", CLEAN_ONLY, "--pair", "scene_00003.png",
                "--pair", "scene_00001.png", "--out", str(out), "--scene-seed", "4", "--quiet", "--no-cache"])
    assert res.exit_code == 0, res.output
    assert sorted(p.name for p in out.iterdir()) == ["01_scene_00003.npy", "01_scene_00003.png",
                                                      "02_scene_00001.npy", "02_scene_00001.png", "explain.json"]
    summary = json.loads((out / "explain.json").read_text())
    assert summary["schema"] == "invariance.explain/1" and summary["method"] == "occlusion"
    saved = np.load(out / "01_scene_00003.npy", allow_pickle=False)
    pairs = discover_pairs(scene_set)
    clean, cluttered = (np.asarray(Image.open(p).convert("RGB")) for p in (pairs.clean[3], pairs.cluttered[3]))
    direct = occlusion_map(encoder, clean, cluttered)  # the default grid: 8 px at 128 px
    np.testing.assert_allclose(saved, direct["map"], rtol=1e-6, atol=1e-9)
    entry = summary["pairs"][0]
    assert summary["patch"] is None and entry["patch"] == 8
    severity = {f: int(pairs.labels.factors[f"factor_{f}"][3]) for f in FACTORS}
    masks = clutter_masks(4, 3, 128, severity)
    assert entry["shares"]["distractors"] == pytest.approx(
        positive_mass_shares(direct["map"], {"d": masks["distractors"]})["d"])
    assert entry["shares"]["surface"] is None and entry["shares"]["lighting"] is None
    second = summary["pairs"][1]["shares"]["distractors"]
    assert summary["shares_mean"]["distractors"] == {"mean": pytest.approx((entry["shares"]["distractors"] + second) / 2),
                                                     "pairs": 2}
    assert summary["shares_mean"]["lighting"] == {"mean": None, "pairs": 0}
    with Image.open(out / "01_scene_00003.png") as im:
        assert im.format == "PNG" and im.size[0] > 3 * 128
    assert "scene_00003.png: drift" in res.output and "distractors" in res.output


@pytest.mark.parametrize("extra, code, words", [
    (["--pair", "scene_00099.png"], 1, "not in the data set"),
    (["--pair", "scene_00001.png", "--patch", "200"], 1, "smaller than the 200 px patch"),
    (["--pair", "scene_00001.png", "--scene-seed", "5"], 1, "is not scene 1 of"),
    (["--pair", "scene_00001.png", "--worst", "2"], 2, "not both"),
    (["--pair", "scene_00001.png", "--layer", "block9"], 1, "no layer 'block9'"),
])
def test_bad_requests_exit_cleanly_and_write_nothing(scene_set, tmp_path, extra, code, words):
    out = tmp_path / "maps"
    res = CliRunner().invoke(cli, ["explain", str(scene_set), "--encoder", CLEAN_ONLY, "--out", str(out),
                                   "--quiet", "--no-cache", *extra])
    assert res.exit_code == code
    assert words in res.output
    assert len([line for line in res.output.splitlines() if line.strip()]) <= 3
    assert not out.exists()


def test_gradient_method_and_layer_through_the_command(scene_set, tmp_path):
    out = tmp_path / "g"
    res = _run(["explain", str(scene_set), "--encoder", CLEAN_ONLY, "--worst", "1", "--method", "gradient",
                "--layer", "block2", "--out", str(out), "--quiet", "--no-cache"])
    assert res.exit_code == 0, res.output
    summary = json.loads((out / "explain.json").read_text())
    assert (summary["method"], summary["layer"], summary["patch"]) == ("gradient", "block2", None)
    saved = np.load(out / f"{summary['pairs'][0]['map'][:-4]}.npy", allow_pickle=False)
    assert saved.shape == (128, 128) and np.isfinite(saved).all() and saved.max() > 0


def test_files_land_together_or_not_at_all(scene_set, tmp_path):
    """A folder in the way of the second figure: exit 1, and the first pair's files are not left behind."""
    out = tmp_path / "maps"
    (out / "02_scene_00001.png").mkdir(parents=True)
    res = CliRunner().invoke(cli, ["explain", str(scene_set), "--encoder", CLEAN_ONLY, "--pair", "scene_00003.png",
                                   "--pair", "scene_00001.png", "--out", str(out), "--quiet", "--no-cache"])
    assert res.exit_code == 1 and "02_scene_00001.png" in res.output
    assert [p.name for p in out.iterdir()] == ["02_scene_00001.png"]


def test_work_per_pair_is_bounded(encoder):
    """Too many patches, or an image whose resize would be huge, is refused before any work."""
    flat = np.zeros((300, 300, 3), dtype=np.uint8)
    with pytest.raises(InvarianceError, match="5,625 patches"):
        occlusion_map(encoder, flat, flat, patch=4, name="big")
    strip = np.zeros((2, 40000, 3), dtype=np.uint8)
    for make in (lambda: occlusion_map(encoder, strip, strip, patch=2), lambda: gradient_map(encoder, strip, strip)):
        with pytest.raises(InvarianceError, match="less elongated"):
            make()
    with pytest.raises(InvarianceError, match="one size"):
        occlusion_map(encoder, flat, flat[:200])


def test_figure_bytes_are_reproducible(encoder):
    from invariance.explain import figure_png

    clean, cluttered, _ = _pair(1, 0, size=64, level=2)
    result = occlusion_map(encoder, clean, cluttered, patch=16)
    first = figure_png(clean, cluttered, result, title="t")
    assert first[:8] == b"\x89PNG\r\n\x1a\n" and first == figure_png(clean, cluttered, result, title="t")
