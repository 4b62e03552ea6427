"""The request index: a repeated request is served from the feature cache without torch."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
from conftest import random_image_pairs

from invariance import feature_index
from invariance.data import PairSet

SPEC = "torchvision:resnet18"
SIZE = 32


@pytest.fixture
def pairs(tmp_path):
    return random_image_pairs(tmp_path, 3)


def _extract_and_remember(cache, pairs, layers, identity, **load):
    from invariance.encoders import extract_features, load_encoder
    from invariance.options import ExtractionOptions

    encoder = load_encoder(SPEC, device="cpu", image_size=SIZE, **load)
    features = extract_features(pairs, encoder, layers=layers, options=ExtractionOptions(cache_dir=cache),
                                progress=False, num_workers=0)
    feature_index.remember(cache, identity, pairs, encoder, layers)
    return features, encoder


def test_a_remembered_request_is_recalled_with_the_same_features(tmp_path, pairs):
    cache, layers = tmp_path / "cache", ["layer3", "output"]
    identity = feature_index.request_identity(SPEC, image_size=SIZE)
    assert feature_index.recall(cache, identity, pairs, layers) is None  # nothing yet
    features, encoder = _extract_and_remember(cache, pairs, layers, identity)
    hit = feature_index.recall(cache, identity, pairs, layers)
    assert hit is not None
    recalled, description = hit
    assert description == encoder.describe()
    for layer in layers:
        for a, b in zip(features[layer], recalled[layer]):
            np.testing.assert_array_equal(a, b)


def test_a_recall_imports_no_torch(tmp_path, pairs):
    # The point of the index: the warm path never pays for importing torch.
    cache = tmp_path / "cache"
    identity = feature_index.request_identity(SPEC, image_size=SIZE)
    _extract_and_remember(cache, pairs, ["output"], identity)
    script = (
        "import sys\n"
        "from invariance import feature_index\n"
        "from invariance.data import PairSet\n"
        f"pairs = PairSet.from_paths({[str(p) for p in pairs.clean]!r}, {[str(p) for p in pairs.cluttered]!r})\n"
        f"identity = feature_index.request_identity({SPEC!r}, image_size={SIZE})\n"
        f"hit = feature_index.recall({str(cache)!r}, identity, pairs, ['output'])\n"
        "print(hit is not None, 'torch' in sys.modules)\n"
    )
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["True", "False"]


def test_anything_that_changes_the_features_changes_the_request(tmp_path):
    weights = tmp_path / "w.pt"
    weights.write_bytes(b"one")
    base = feature_index.request_identity(SPEC, weights=weights, image_size=SIZE)
    assert feature_index.request_identity(SPEC, weights=weights, image_size=64) != base
    assert feature_index.request_identity("torchvision:resnet34", weights=weights, image_size=SIZE) != base
    assert feature_index.request_identity(SPEC, weights=weights, image_size=SIZE, trusted_code=["python:x:y"]) != base
    weights.write_bytes(b"two")  # same path, other bytes
    assert feature_index.request_identity(SPEC, weights=weights, image_size=SIZE) != base


def test_specs_whose_identity_needs_code_are_never_indexed(tmp_path):
    # A module name may resolve to different files depending on code that runs at import.
    assert feature_index.request_identity("python:some_lab_module:build") is None
    assert feature_index.request_identity(f"checkpoint:{tmp_path / 'missing.pt'}") is None  # load reports it
    assert feature_index.request_identity("python:invariance.zoo:clean_only_encoder") is not None


def test_other_images_or_layers_miss(tmp_path, pairs):
    cache = tmp_path / "cache"
    identity = feature_index.request_identity(SPEC, image_size=SIZE)
    _extract_and_remember(cache, pairs, ["output"], identity)
    assert feature_index.recall(cache, identity, pairs, ["output", "layer3"]) is None  # one layer missing
    fewer = PairSet.from_paths(pairs.clean[:2], pairs.cluttered[:2])
    assert feature_index.recall(cache, identity, fewer, ["output"]) is None


def test_a_damaged_record_or_entry_is_a_miss_not_an_error(tmp_path, pairs):
    cache = tmp_path / "cache"
    identity = feature_index.request_identity(SPEC, image_size=SIZE)
    _extract_and_remember(cache, pairs, ["output"], identity)
    record = next((cache / "requests").glob("*.json"))
    saved = record.read_text()
    record.write_text(json.dumps({"format": "invariance.request/1", "entry": "../../etc/passwd", "encoder": {}}))
    assert feature_index.recall(cache, identity, pairs, ["output"]) is None  # a path, not a key: ignored
    record.write_text(saved)
    entry = next(cache.glob("*.npz"))
    entry.write_bytes(b"not an npz")
    with pytest.warns(RuntimeWarning, match="unreadable"):
        assert feature_index.recall(cache, identity, pairs, ["output"]) is None
