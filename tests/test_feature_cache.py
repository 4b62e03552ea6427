"""Feature cache: hits skip the forward pass, any change misses, damaged entries are rebuilt."""

from __future__ import annotations

import hashlib
import io
import json

import numpy as np
import pytest
import torch
import torchvision
from PIL import Image

from conftest import random_image_pairs
from invariance.data import PairSet
from invariance.encoders import cache as feature_cache
from invariance.encoders import extract_features, load_encoder
from invariance.options import ExtractionOptions
from invariance.errors import InvarianceError

SIZE = 32


pytestmark = pytest.mark.usefixtures("one_torch_thread")


@pytest.fixture
def pairs(tmp_path):
    return random_image_pairs(tmp_path, 4)


@pytest.fixture
def encoder():
    return load_encoder("torchvision:resnet18", device="cpu", image_size=SIZE)


class _Forwards:
    """Counts forward passes with a forward hook on a leaf module (torch.fx tracing never calls a leaf)."""

    def __init__(self, module):
        self.calls = 0
        self._handle = module.register_forward_hook(self._hook)

    def _hook(self, *_):
        self.calls += 1


def _entries(cache):
    return sorted(cache.glob("*.npz"))


def test_second_call_is_served_from_cache(tmp_path, pairs, encoder):
    cache = tmp_path / "cache"
    counter = _Forwards(encoder.module.conv1)
    first = extract_features(pairs, encoder, progress=False, options=ExtractionOptions(cache_dir=cache))["output"]
    assert counter.calls == 1  # 4 pairs fit one batch of 8 images
    assert len(_entries(cache)) == 1
    second = extract_features(pairs, encoder, progress=False, options=ExtractionOptions(cache_dir=cache))["output"]
    assert counter.calls == 1
    np.testing.assert_array_equal(first[0], second[0])
    np.testing.assert_array_equal(first[1], second[1])
    assert second[0].dtype == np.float32


def test_entry_header_describes_its_content(tmp_path, pairs, encoder):
    cache = tmp_path / "cache"
    clean, cluttered = extract_features(pairs, encoder, progress=False, options=ExtractionOptions(cache_dir=cache))["output"]
    (entry,) = _entries(cache)
    with np.load(entry, allow_pickle=False) as npz:
        header = json.loads(bytes(npz["header"]).decode())
    assert header["spec"] == "torchvision:resnet18" and header["layer"] == "output"
    assert header["shape"] == [4, 512] and header["content_hash"] == pairs.content_hash()
    assert header["key"] == entry.stem
    # Checksum: SHA-256 over dtype, shape and bytes of both arrays (common practice).
    digest = hashlib.sha256()
    for arr in (clean, cluttered):
        digest.update(f"{arr.dtype.str}{arr.shape}".encode())
        digest.update(arr.tobytes())
    assert header["checksum"] == digest.hexdigest()


def test_changed_image_content_misses(tmp_path, pairs, encoder):
    cache = tmp_path / "cache"
    before = extract_features(pairs, encoder, progress=False, options=ExtractionOptions(cache_dir=cache))["output"]
    Image.fromarray(np.full((36, 36, 3), 200, np.uint8)).save(pairs.cluttered[1])
    changed = PairSet.from_paths(pairs.clean, pairs.cluttered)  # content hash is computed once per set
    counter = _Forwards(encoder.module.conv1)
    after = extract_features(changed, encoder, progress=False, options=ExtractionOptions(cache_dir=cache))["output"]
    assert counter.calls == 1 and len(_entries(cache)) == 2
    np.testing.assert_array_equal(before[0], after[0])
    assert not np.allclose(before[1][1], after[1][1])


def test_changed_weights_miss_even_when_trained_in_place(tmp_path, pairs, encoder):
    cache = tmp_path / "cache"
    before = extract_features(pairs, encoder, progress=False, options=ExtractionOptions(cache_dir=cache))["output"]
    with torch.no_grad():
        encoder.module.layer4[1].conv2.weight.mul_(-1.0)
    counter = _Forwards(encoder.module.conv1)
    after = extract_features(pairs, encoder, progress=False, options=ExtractionOptions(cache_dir=cache))["output"]
    assert counter.calls == 1 and len(_entries(cache)) == 2
    assert not np.allclose(before[0], after[0])


def test_weights_file_changes_the_key(tmp_path, pairs):
    cache = tmp_path / "cache"
    results = []
    for seed in (1, 2):
        with torch.random.fork_rng():
            torch.manual_seed(seed)
            state = torchvision.models.resnet18().state_dict()
        torch.save(state, tmp_path / "w.pt")
        enc = load_encoder("torchvision:resnet18", weights=tmp_path / "w.pt", device="cpu", image_size=SIZE)
        results.append(extract_features(pairs, enc, progress=False, options=ExtractionOptions(cache_dir=cache))["output"][0])
    assert len(_entries(cache)) == 2
    assert not np.allclose(results[0], results[1])


def test_each_layer_has_its_own_entry(tmp_path, pairs, encoder):
    cache = tmp_path / "cache"
    extract_features(pairs, encoder, progress=False, options=ExtractionOptions(cache_dir=cache))
    counter = _Forwards(encoder.module.conv1)
    feats = extract_features(pairs, encoder, ["output", "layer1"], progress=False, options=ExtractionOptions(cache_dir=cache))
    assert counter.calls == 1 and len(_entries(cache)) == 2
    assert feats["layer1"][0].shape == (4, 64)
    again = extract_features(pairs, encoder, ["layer1", "output"], progress=False, options=ExtractionOptions(cache_dir=cache))
    assert counter.calls == 1
    np.testing.assert_array_equal(again["layer1"][0], feats["layer1"][0])


def test_garbage_entry_is_deleted_and_rebuilt(tmp_path, pairs, encoder):
    cache = tmp_path / "cache"
    good = extract_features(pairs, encoder, progress=False, options=ExtractionOptions(cache_dir=cache))["output"]
    (entry,) = _entries(cache)
    entry.write_bytes(b"PK\x03\x04 not really a zip")
    with pytest.warns(RuntimeWarning, match="unreadable.*extracting again"):
        rebuilt = extract_features(pairs, encoder, progress=False, options=ExtractionOptions(cache_dir=cache))["output"]
    np.testing.assert_array_equal(good[0], rebuilt[0])
    assert feature_cache.load(cache, entry.stem, rows=4, content_hash=pairs.content_hash()) is not None


def test_edited_arrays_fail_the_checksum(tmp_path, pairs, encoder):
    cache = tmp_path / "cache"
    good = extract_features(pairs, encoder, progress=False, options=ExtractionOptions(cache_dir=cache))["output"]
    (entry,) = _entries(cache)
    with np.load(entry, allow_pickle=False) as npz:
        parts = {name: np.array(npz[name]) for name in npz.files}
    parts["clean"][0, 0] += 1.0
    buf = io.BytesIO()
    np.savez(buf, **parts)
    entry.write_bytes(buf.getvalue())
    counter = _Forwards(encoder.module.conv1)
    with pytest.warns(RuntimeWarning, match="checksum mismatch"):
        rebuilt = extract_features(pairs, encoder, progress=False, options=ExtractionOptions(cache_dir=cache))["output"]
    assert counter.calls == 1
    np.testing.assert_array_equal(good[0], rebuilt[0])


def test_entry_for_other_images_is_stale(tmp_path, pairs, encoder):
    cache = tmp_path / "cache"
    extract_features(pairs, encoder, progress=False, options=ExtractionOptions(cache_dir=cache))
    (entry,) = _entries(cache)
    with pytest.warns(RuntimeWarning, match="stale"):
        assert feature_cache.load(cache, entry.stem, rows=4, content_hash="0" * 64) is None
    assert not entry.exists()
    feature_cache.store(cache, "k", np.zeros((3, 2), np.float32), np.zeros((3, 2), np.float32), {"content_hash": "h"})
    with pytest.warns(RuntimeWarning, match="wrong shape"):
        assert feature_cache.load(cache, "k", rows=4, content_hash="h") is None


def test_nothing_is_cached_when_extraction_fails(tmp_path, pairs, encoder):
    cache = tmp_path / "cache"
    pairs.cluttered[3].write_bytes(b"broken")
    with pytest.raises(InvarianceError, match="s3.png"):
        extract_features(pairs, encoder, ["output", "layer2"], progress=False, options=ExtractionOptions(batch_size=2, cache_dir=cache))
    assert _entries(cache) == []


def test_cache_key_is_canonical():
    a = feature_cache.cache_key({"spec": "x", "layer": "output", "preprocess": {"crop": 32, "resize": 32}})
    b = feature_cache.cache_key({"preprocess": {"resize": 32, "crop": 32}, "layer": "output", "spec": "x"})
    c = feature_cache.cache_key({"spec": "x", "layer": "layer1", "preprocess": {"crop": 32, "resize": 32}})
    assert a == b and a != c and len(a) == 64
