"""Extraction into a features directory: local engine, Ray Data engine, failures, resuming."""

import time

import numpy as np
import pytest

from invariance.data import discover_pairs
from invariance.encoders import extract_features, load_encoder
from invariance.errors import InvalidParameter, InvarianceError
from invariance.extract import extract_to_directory
from invariance.features_dir import FeaturesDirectory, load_features
from invariance.options import ExtractionOptions
from invariance.scenes import generate_scenes

SPEC = "python:invariance.zoo:workbench_cnn"  # the tiny demo CNN: quick on CPU


@pytest.fixture(scope="module")
def scenes(tmp_path_factory):
    return generate_scenes(tmp_path_factory.mktemp("scenes") / "s", pairs=200, size=64, seed=3)


@pytest.fixture(scope="module")
def local_dir(scenes, tmp_path_factory, one_torch_thread):
    out = tmp_path_factory.mktemp("local") / "features"
    extract_to_directory(scenes, SPEC, out, shard_size=64, device="cpu", progress=False)
    return out


def test_local_engine_matches_extract_features_and_resumes(scenes, local_dir, tmp_path):
    pairs = discover_pairs(scenes)
    encoder = load_encoder(SPEC, device="cpu")
    clean, cluttered = extract_features(pairs, encoder, options=ExtractionOptions(cache_dir=None),
                                        progress=False)["output"]
    got_clean, got_cluttered, names = load_features(local_dir, spec=SPEC, layer="output")
    # the same encoder code on the same images: equal up to float32 rounding of batching
    np.testing.assert_allclose(got_clean, clean, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(got_cluttered, cluttered, rtol=1e-5, atol=1e-6)
    assert names == pairs.names
    assert FeaturesDirectory(local_dir).identity["spec"] == SPEC
    again = extract_to_directory(scenes, SPEC, local_dir, shard_size=64, device="cpu", progress=False)
    assert (again["shards_written"], again["shards_kept"], again["shards"]) == (0, 4, 4)


def test_directory_of_another_encoder_or_shard_size_is_refused(scenes, local_dir):
    with pytest.raises(InvarianceError, match="holds features of encoder"):
        extract_to_directory(scenes, SPEC, local_dir, layers=["block2"], shard_size=64, device="cpu", progress=False)
    with pytest.raises(InvarianceError, match="other pairs"):
        extract_to_directory(scenes, SPEC, local_dir, shard_size=50, device="cpu", progress=False)


def test_bad_parameters_and_unreachable_ray_address(scenes, tmp_path):
    with pytest.raises(InvalidParameter, match="engine"):
        extract_to_directory(scenes, SPEC, tmp_path / "x", engine="spark")
    with pytest.raises(InvalidParameter, match="shard_size"):
        extract_to_directory(scenes, SPEC, tmp_path / "x", shard_size=0)
    pytest.importorskip("ray", reason="Ray is not installed (optional extra `ray`)")
    with pytest.raises(InvalidParameter, match="HOST:PORT"):
        extract_to_directory(scenes, SPEC, tmp_path / "x", engine="ray", address="nowhere")
    start = time.monotonic()
    # port 9 (discard) on the loopback: nothing listens there, so the connection is refused
    with pytest.raises(InvarianceError, match="cannot be reached"):
        extract_to_directory(scenes, SPEC, tmp_path / "x", engine="ray", address="127.0.0.1:9")
    assert time.monotonic() - start < 60  # refused, not waited on (bound far above the 5 s timeout)
    assert not (tmp_path / "x").exists()


# --- Ray Data ---------------------------------------------------------------------------

_FLAKY = '''
import os
import torch
from invariance.zoo import workbench_cnn

MARK = {mark!r}


class Flaky(torch.nn.Module):
    """The demo CNN, except that the second forward pass of one actor raises, once per marker."""

    def __init__(self):
        super().__init__()
        self.net = workbench_cnn()
        self.invariance_preprocess = self.net.invariance_preprocess
        self.calls = 0

    def forward(self, x):
        self.calls += 1
        if self.calls == 2:
            try:
                os.close(os.open(MARK, os.O_CREAT | os.O_EXCL))
            except FileExistsError:
                pass
            else:
                raise RuntimeError("injected actor failure")
        return self.net(x)


def build():
    return Flaky()
'''


@pytest.fixture(scope="module")
def ray_local():
    ray = pytest.importorskip("ray", reason="Ray is not installed (optional extra `ray`)")
    ray.init(num_cpus=2, include_dashboard=False, log_to_driver=False, logging_level="error")
    yield ray
    ray.shutdown()


@pytest.mark.slow
def test_ray_engine_gives_the_local_features_and_score(ray_local, scenes, local_dir, tmp_path):
    from invariance.options import ScoringOptions
    from invariance.scoring import score_features

    out = tmp_path / "ray"
    summary = extract_to_directory(scenes, SPEC, out, engine="ray", workers=2, shard_size=64, progress=False)
    assert (summary["workers"], summary["shards_written"]) == (2, 4)
    ray_clean, ray_cluttered, ray_names = load_features(out, spec=SPEC)
    clean, cluttered, names = load_features(local_dir, spec=SPEC)
    assert ray_names == names
    np.testing.assert_allclose(ray_clean, clean, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(ray_cluttered, cluttered, rtol=1e-5, atol=1e-6)
    options = ScoringOptions(permutations=100, seed=0)
    a = score_features(ray_clean, ray_cluttered, names=ray_names, options=options)["metrics"]
    b = score_features(clean, cluttered, names=names, options=options)["metrics"]
    assert a["domain_classifier"]["accuracy"] == b["domain_classifier"]["accuracy"]
    assert a["mmd"]["p_value"] == b["mmd"]["p_value"]
    assert a["paired_drift"]["relative_drift"] == pytest.approx(b["paired_drift"]["relative_drift"], rel=1e-5)
    assert a["cka"] == pytest.approx(b["cka"], abs=1e-6)


@pytest.mark.slow
def test_actor_failure_loses_and_duplicates_no_shard(ray_local, scenes, local_dir, tmp_path):
    # 60 pairs in 8 shards (8 blocks for 2 actors: one actor makes at least a second call)
    data = discover_pairs(scenes).subset(range(60))
    clean_all, cluttered_all, names_all = load_features(local_dir)
    reference = clean_all[:60], cluttered_all[:60], names_all[:60]
    for retries, mark in ((1, "auto"), (0, "manual")):
        module = tmp_path / f"flaky_{mark}.py"
        module.write_text(_FLAKY.format(mark=str(tmp_path / f"{mark}.mark")))
        spec = f"python:{module}:build"
        out = tmp_path / mark
        if retries == 0:
            with pytest.raises(InvarianceError, match="injected actor failure.*rerun the same command to resume"):
                extract_to_directory(data, spec, out, engine="ray", workers=2, shard_size=8, retries=0,
                                     progress=False)
            assert not (out / "manifest.json").exists()  # an unfinished folder is never read as whole
        summary = extract_to_directory(data, spec, out, engine="ray", workers=2, shard_size=8, retries=retries,
                                       progress=False)
        assert (tmp_path / f"{mark}.mark").exists()  # the failure did happen
        assert summary["shards"] == 8 and summary["shards_kept"] + summary["shards_written"] == 8
        feats = FeaturesDirectory(out)
        assert feats.names == reference[2]  # every pair once, in order
        clean, cluttered = feats.arrays()
        np.testing.assert_allclose(clean, reference[0], rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(cluttered, reference[1], rtol=1e-5, atol=1e-6)


def test_command_line_writes_and_refuses(scenes, tmp_path):
    from click.testing import CliRunner

    from invariance.cli.extract import extract

    runner = CliRunner()
    result = runner.invoke(extract, [str(scenes), "--encoder", SPEC, "--out", str(tmp_path / "f"), "--device", "cpu",
                                     "--shard-size", "100", "--quiet"])
    assert result.exit_code == 0, result.output
    assert "2 shard(s) written, 0 kept" in result.output
    assert FeaturesDirectory(tmp_path / "f").n_pairs == 200
    bad = runner.invoke(extract, [str(scenes), "--encoder", SPEC, "--out", str(tmp_path / "g"), "--batch-size", "1"])
    assert bad.exit_code == 2 and "--batch-size" in bad.output
    other = runner.invoke(extract, [str(scenes), "--encoder", SPEC, "--out", str(tmp_path / "f"), "--device", "cpu",
                                    "--layer", "block2", "--quiet"])
    assert other.exit_code == 1 and "holds features of encoder" in other.output


def test_unknown_layer_is_refused_before_extracting(scenes, tmp_path):
    with pytest.raises(InvalidParameter, match=r"\['no_such_node'\] are not nodes"):
        extract_to_directory(scenes, SPEC, tmp_path / "f", layers=["no_such_node"], device="cpu", progress=False)
    assert not (tmp_path / "f" / "manifest.json").exists()
