"""The features directory: layout, checksums, identity checks, the lock, resuming."""

import hashlib
import json

import numpy as np
import pytest

from invariance.errors import InvarianceError
from invariance.features_dir import (MANIFEST, SHARDS, FeaturesDirectory, ShardWriter, file_sha256, identity_sha256,
                                     load_features)


def _identity(spec="python:demo:net", layers=("output",)):
    ident = {"spec": spec, "weights_sha256": None, "state_sha256": "0" * 64, "code_sha256": None,
             "preprocess": {"resize": 64}, "layers": list(layers)}
    ident["identity_sha256"] = identity_sha256(ident)
    return ident


def _write(path, n=10, shard=4, d=3, identity=None, seed=0, only=None):
    rng = np.random.default_rng(seed)
    clean, cluttered = rng.normal(size=(n, d)).astype(np.float32), rng.normal(size=(n, d)).astype(np.float32)
    names = [f"scene_{i:03d}.png" for i in range(n)]
    plan = [list(range(s, min(s + shard, n))) for s in range(0, n, shard)]
    with ShardWriter(path) as writer:
        todo = writer.begin(identity or _identity(), [[names[i] for i in idx] for idx in plan])
        for index in todo if only is None else [i for i in todo if i in only]:
            idx = plan[index]
            writer.write(index, {"output": (clean[idx], cluttered[idx])}, episodes=[f"ep{i // 5}" for i in idx])
        if only is None:
            writer.finish()
    return clean, cluttered, names, todo


def test_round_trip_and_checksums_match_sha256sum(tmp_path):
    clean, cluttered, names, todo = _write(tmp_path / "f")
    assert todo == [0, 1, 2]
    got_clean, got_cluttered, got_names = load_features(tmp_path / "f", layer="output")
    np.testing.assert_array_equal(got_clean, clean)
    np.testing.assert_array_equal(got_cluttered, cluttered)
    assert got_names == names
    feats = FeaturesDirectory(tmp_path / "f")
    assert feats.episodes == [f"ep{i // 5}" for i in range(10)]
    manifest = json.loads((tmp_path / "f" / MANIFEST).read_text())
    # the manifest's checksum is the plain SHA-256 of the file (FIPS 180-4, as sha256sum prints it)
    first = tmp_path / "f" / SHARDS / manifest["shards"][0]["files"][0]
    assert manifest["shards"][0]["sha256"][0] == hashlib.sha256(first.read_bytes()).hexdigest() == file_sha256(first)
    assert [s["rows"] for s in manifest["shards"]] == [4, 4, 2]
    # rows() gathers across shards
    c, k = feats.rows([1, 5, 9])
    np.testing.assert_array_equal(c, clean[[1, 5, 9]])
    np.testing.assert_array_equal(k, cluttered[[1, 5, 9]])


def test_corrupt_and_missing_shards_are_named_with_their_checksum(tmp_path):
    _write(tmp_path / "f")
    manifest = json.loads((tmp_path / "f" / MANIFEST).read_text())
    shard = tmp_path / "f" / SHARDS / manifest["shards"][1]["files"][0]
    data = bytearray(shard.read_bytes())
    data[-1] ^= 0xFF
    shard.write_bytes(bytes(data))
    with pytest.raises(InvarianceError, match=rf"{shard.name}.*corrupt.*{manifest['shards'][1]['sha256'][0]}"):
        load_features(tmp_path / "f")
    shard.unlink()
    with pytest.raises(InvarianceError, match=rf"shard 1 is missing.*{manifest['shards'][1]['sha256'][0]}"):
        load_features(tmp_path / "f")


def test_other_encoder_or_layer_is_refused(tmp_path):
    _write(tmp_path / "f")
    with pytest.raises(InvarianceError, match="not of encoder 'torchvision:resnet18'"):
        FeaturesDirectory(tmp_path / "f", spec="torchvision:resnet18")
    with pytest.raises(InvarianceError, match="not layer 'layer3'"):
        FeaturesDirectory(tmp_path / "f", layer="layer3")
    with pytest.raises(InvarianceError, match="other weights"):
        FeaturesDirectory(tmp_path / "f", identity_sha256="f" * 64)
    # writing another encoder's features into the folder is refused too
    with pytest.raises(InvarianceError, match="holds features of encoder 'python:demo:net'"):
        _write(tmp_path / "f", identity=_identity(spec="python:other:net"))


def test_unfinished_directory_is_not_read_and_resumes_missing_shards_only(tmp_path):
    clean, cluttered, _, todo = _write(tmp_path / "f", only={0, 2})
    assert todo == [0, 1, 2]
    with pytest.raises(InvarianceError, match="has not finished"):
        FeaturesDirectory(tmp_path / "f")
    _, _, _, todo = _write(tmp_path / "f")
    assert todo == [1]  # shards 0 and 2 were kept
    got_clean, _, _ = load_features(tmp_path / "f")
    np.testing.assert_array_equal(got_clean, clean)
    # a shard whose file was damaged is written again on the next run
    shard = next((tmp_path / "f" / SHARDS).glob("00002.L0.npy"))
    shard.write_bytes(shard.read_bytes()[:-4])
    _, _, _, todo = _write(tmp_path / "f")
    assert todo == [2]


def test_second_writer_is_refused_while_the_first_holds_the_lock(tmp_path):
    with ShardWriter(tmp_path / "f"):
        with pytest.raises(InvarianceError, match="another extraction is writing"):
            with ShardWriter(tmp_path / "f"):
                pass
    with ShardWriter(tmp_path / "f"):  # released on exit
        pass


def test_malformed_manifest_and_pickled_shard_are_refused(tmp_path):
    _write(tmp_path / "f")
    path = tmp_path / "f" / MANIFEST
    manifest = json.loads(path.read_text())
    manifest["shards"][0]["rows"] = "4"
    path.write_text(json.dumps(manifest))
    with pytest.raises(InvarianceError, match="malformed"):
        FeaturesDirectory(tmp_path / "f")
    # an object array with a matching checksum is still never unpickled
    _write(tmp_path / "g", n=4, shard=4)
    manifest = json.loads((tmp_path / "g" / MANIFEST).read_text())
    shard = tmp_path / "g" / SHARDS / manifest["shards"][0]["files"][0]
    np.save(shard, np.array([[{"x": 1}]], dtype=object), allow_pickle=True)
    manifest["shards"][0]["sha256"][0] = file_sha256(shard)
    (tmp_path / "g" / MANIFEST).write_text(json.dumps(manifest))
    with pytest.raises(InvarianceError, match="not a readable .npy shard"):
        load_features(tmp_path / "g")
