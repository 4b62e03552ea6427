"""Encoder specs, preprocessing, layer taps and extraction, checked against torchvision itself."""

from __future__ import annotations

import hashlib
import json
import os
import sys
import textwrap

import numpy as np
import pytest
import torch
import torchvision
from PIL import Image
from torchvision import transforms as T

from invariance import encoders
from invariance.data import PairSet, load_rgb
from invariance.options import ExtractionOptions
from invariance.encoders import Preprocess, extract_features, load_encoder, save_checkpoint
from invariance.errors import InvalidParameter, InvarianceError

SIZE = 32


pytestmark = pytest.mark.usefixtures("one_torch_thread")


def _write_pairs(root, n=5, size=(40, 48), seed=0):
    rng = np.random.default_rng(seed)
    clean, cluttered = [], []
    for view, paths in (("clean", clean), ("cluttered", cluttered)):
        (root / view).mkdir(parents=True, exist_ok=True)
        for i in range(n):
            path = root / view / f"scene_{i}.png"
            Image.fromarray(rng.integers(0, 256, (*size, 3), dtype=np.uint8)).save(path)
            paths.append(path)
    return PairSet.from_paths(clean, cluttered)


@pytest.fixture
def pairs(tmp_path):
    return _write_pairs(tmp_path / "data")


@pytest.fixture(scope="module")
def resnet18():
    return load_encoder("torchvision:resnet18", device="cpu", image_size=SIZE)


USER_MODULE = '''
import torch
from torch import nn
from torchvision.models import VisionTransformer


def tiny_vit():
    model = VisionTransformer(image_size=32, patch_size=8, num_layers=2, num_heads=2, hidden_dim=32, mlp_dim=64)
    model.heads = nn.Identity()
    model.invariance_preprocess = {"image_size": 32, "mean": [0.5, 0.5, 0.5], "std": [0.25, 0.25, 0.25]}
    return model


class Conv(nn.Module):
    def __init__(self, kernel=3):
        super().__init__()
        self.conv = nn.Conv2d(3, 6, kernel)

    def forward(self, x):
        return self.conv(x)


def conv_net():
    model = Conv()
    model.invariance_preprocess = {"image_size": 32}
    return model


def big_kernel():
    model = Conv(kernel=48)
    model.invariance_preprocess = {"image_size": 32}
    return model


class NaNNet(nn.Module):
    def forward(self, x):
        out = x.mean(dim=(2, 3))
        out[1] = float("nan")
        return out


def nan_net():
    model = NaNNet()
    model.invariance_preprocess = {"image_size": 32}
    return model


class TupleNet(nn.Module):
    def forward(self, x):
        return (x.mean(dim=(2, 3)),)


def tuple_net():
    model = TupleNet()
    model.invariance_preprocess = {"image_size": 32}
    return model


def broken():
    raise ValueError("no weights here")


def not_a_module():
    return 42
'''


@pytest.fixture
def user_file(tmp_path):
    path = tmp_path / "user_encoders.py"
    path.write_text(textwrap.dedent(USER_MODULE))
    return path


def _reference_tensors(pairs, view, size=SIZE, mean=encoders.IMAGENET_MEAN, std=encoders.IMAGENET_STD):
    # torchvision's classic classification pipeline (Resize, CenterCrop, ToTensor, Normalize).
    tf = T.Compose([T.Resize(size), T.CenterCrop(size), T.ToTensor(), T.Normalize(mean, std)])
    return torch.stack([tf(load_rgb(p)) for p in getattr(pairs, view)])


def _resnet_pooled(model, x):
    # Reference: torchvision ResNet._forward_impl up to torch.flatten(self.avgpool(x), 1).
    x = model.maxpool(model.relu(model.bn1(model.conv1(x))))
    x = model.layer4(model.layer3(model.layer2(model.layer1(x))))
    return torch.flatten(model.avgpool(x), 1)


# --------------------------------------------------------------------------- preprocess


def test_preprocess_from_weights_equals_torchvision_transforms():
    # Reference: torchvision's ResNet18_Weights.IMAGENET1K_V1.transforms() (ImageClassification).
    weights = torchvision.models.ResNet18_Weights.IMAGENET1K_V1
    img = Image.fromarray(np.random.default_rng(1).integers(0, 256, (300, 260, 3), dtype=np.uint8))
    ours = Preprocess.from_weights(weights)
    assert (ours.resize, ours.crop) == (256, 224)
    torch.testing.assert_close(ours(img), weights.transforms()(img), atol=1e-5, rtol=0)


def test_preprocess_rejects_bad_values():
    with pytest.raises(InvarianceError, match="crop 64 px is larger than resize 32"):
        Preprocess(resize=32, crop=64)
    with pytest.raises(InvarianceError, match="std must be positive"):
        Preprocess(resize=32, crop=32, std=(0.2, 0.0, 0.2))
    with pytest.raises(InvarianceError, match="3 numbers"):
        Preprocess(resize=32, crop=32, mean=(0.5, 0.5))


def test_image_size_sets_resize_and_crop(resnet18):
    assert resnet18.preprocess.describe()["resize"] == SIZE
    assert resnet18.preprocess.describe()["crop"] == SIZE
    default = load_encoder("torchvision:mobilenet_v3_small", device="cpu")
    # ImageNet defaults, common practice: resize 256, crop 224.
    assert (default.preprocess.resize, default.preprocess.crop) == (256, 224)


# --------------------------------------------------------------------------- torchvision


def test_resnet18_pooled_features_equal_manual_forward(pairs, resnet18):
    with torch.random.fork_rng():
        torch.manual_seed(0)
        reference = torchvision.models.resnet18().eval()
    state_before = torch.random.get_rng_state()
    load_encoder("torchvision:resnet18", device="cpu", image_size=SIZE)
    feats = extract_features(pairs, resnet18, progress=False)["output"]
    assert torch.equal(state_before, torch.random.get_rng_state())  # caller's RNG untouched
    with torch.inference_mode():
        for view, got in zip(("clean", "cluttered"), feats):
            expected = _resnet_pooled(reference, _reference_tensors(pairs, view)).numpy()
            assert got.dtype == np.float32 and got.shape == (len(pairs), 512)
            np.testing.assert_allclose(got, expected, rtol=1e-4, atol=1e-5)


def test_mobilenet_v3_small_pooled_features_equal_manual_forward(pairs):
    enc = load_encoder("torchvision:mobilenet_v3_small", device="cpu", image_size=SIZE)
    assert isinstance(enc.module.classifier, torch.nn.Identity)
    model = enc.module
    got = extract_features(pairs, enc, progress=False)["output"]
    with torch.inference_mode():
        # Reference: torchvision MobileNetV3._forward_impl up to torch.flatten(self.avgpool(x), 1).
        expected = torch.flatten(model.avgpool(model.features(_reference_tensors(pairs, "clean"))), 1)
    assert got[0].shape == (len(pairs), 576)
    np.testing.assert_allclose(got[0], expected.numpy(), rtol=1e-4, atol=1e-5)


def test_random_init_is_reproducible_and_layer_taps_match_manual(pairs, resnet18):
    again = load_encoder("torchvision:resnet18", device="cpu", image_size=SIZE)
    for a, b in zip(resnet18.module.state_dict().values(), again.module.state_dict().values()):
        assert torch.equal(a, b)
    feats = extract_features(pairs, resnet18, ["layer1", "output", "layer3.1"], progress=False)
    assert list(feats) == ["layer1", "output", "layer3.1"]
    model = resnet18.module
    with torch.inference_mode():
        x = _reference_tensors(pairs, "cluttered")
        stem = model.maxpool(model.relu(model.bn1(model.conv1(x))))
        layer1 = model.layer1(stem)
        layer3 = model.layer3(model.layer2(layer1))
        # Spatial maps are globally average-pooled (as torchvision's avgpool does).
        np.testing.assert_allclose(feats["layer1"][1], layer1.mean(dim=(2, 3)).numpy(), rtol=1e-4, atol=1e-5)
        np.testing.assert_allclose(feats["layer3.1"][1], layer3.mean(dim=(2, 3)).numpy(), rtol=1e-4, atol=1e-5)
        np.testing.assert_allclose(feats["output"][1], _resnet_pooled(model, x).numpy(), rtol=1e-4, atol=1e-5)


def test_rows_follow_pair_order_and_batching(pairs, resnet18):
    full = extract_features(pairs, resnet18, progress=False, options=ExtractionOptions(batch_size=4))["output"]
    order = [3, 0, 4]
    part = extract_features(pairs.subset(order), resnet18, progress=False, options=ExtractionOptions(batch_size=2))["output"]
    np.testing.assert_allclose(part[0], full[0][order], rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(part[1], full[1][order], rtol=1e-4, atol=1e-5)
    assert not np.allclose(full[0], full[1])  # clean and cluttered rows are not mixed up


def test_worker_processes_give_the_same_features(pairs, resnet18):
    main = extract_features(pairs, resnet18, progress=False, num_workers=0, options=ExtractionOptions(batch_size=4))["output"]
    workers = extract_features(pairs, resnet18, progress=False, num_workers=1, options=ExtractionOptions(batch_size=4))["output"]
    np.testing.assert_allclose(main[0], workers[0], rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(main[1], workers[1], rtol=1e-5, atol=1e-6)


def test_progress_goes_to_stderr_only_when_asked(pairs, resnet18, capsys):
    extract_features(pairs.subset([0]), resnet18, progress=True)
    shown = capsys.readouterr()
    assert "features torchvision:resnet18" in shown.err and shown.out == ""
    extract_features(pairs.subset([0]), resnet18, progress=False)
    quiet = capsys.readouterr()
    assert quiet.err == "" and quiet.out == ""


def test_unknown_layer_lists_nearest_names(pairs, resnet18):
    with pytest.raises(InvarianceError, match="no layer 'layer5'.*layer4"):
        extract_features(pairs, resnet18, ["layer5"], progress=False)


def test_available_layers_lists_graph_nodes_and_blocks(resnet18):
    from torchvision.models.feature_extraction import get_graph_node_names

    names = encoders.available_layers(resnet18)
    assert names[0] == "output"
    assert {"layer1", "layer4", "layer4.1"} <= set(names)
    assert set(get_graph_node_names(resnet18.module)[1]) <= set(names)


@pytest.mark.slow  # builds vit_b_16 (86M parameters) twice
def test_vit_b_16_builds_and_lists_encoder_blocks():
    enc = load_encoder("torchvision:vit_b_16", device="cpu")
    names = encoders.available_layers(enc)
    assert "encoder.layers.encoder_layer_11" in names and "encoder.ln" in names
    assert isinstance(enc.module.heads, torch.nn.Identity)
    with pytest.raises(InvarianceError, match="exactly 224 px.*image_size=224"):
        load_encoder("torchvision:vit_b_16", device="cpu", image_size=64)


def test_unknown_architecture_names_close_matches():
    with pytest.raises(InvarianceError, match="unknown torchvision architecture 'resnt18'.*resnet18"):
        load_encoder("torchvision:resnt18", device="cpu")


def test_bad_spec_form_and_misplaced_weights(tmp_path):
    with pytest.raises(InvarianceError, match="unknown form 'onnx'"):
        load_encoder("onnx:model.onnx", device="cpu")
    with pytest.raises(InvarianceError, match="must look like"):
        load_encoder("resnet18", device="cpu")
    with pytest.raises(InvarianceError, match="only applies to torchvision"):
        load_encoder(f"torchscript:{tmp_path / 'm.pt'}", weights=tmp_path / "w.pt", device="cpu")


# --------------------------------------------------------------------------- weights files


def test_weights_file_full_classifier_and_feature_only(tmp_path, pairs):
    with torch.random.fork_rng():
        torch.manual_seed(7)
        trained = torchvision.models.resnet18(num_classes=10).eval()
    full = tmp_path / "full.pt"
    torch.save(trained.state_dict(), full)
    trunk = tmp_path / "trunk.pt"
    torch.save({"state_dict": {k: v for k, v in trained.state_dict().items() if not k.startswith("fc.")}}, trunk)
    expected = None
    for path in (full, trunk):
        enc = load_encoder("torchvision:resnet18", weights=path, device="cpu", image_size=SIZE)
        assert enc.weights_sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
        got = extract_features(pairs, enc, progress=False)["output"][0]
        if expected is None:
            with torch.inference_mode():
                expected = _resnet_pooled(trained, _reference_tensors(pairs, "clean")).numpy()
        np.testing.assert_allclose(got, expected, rtol=1e-4, atol=1e-5)


def test_weights_of_another_architecture_name_the_keys(tmp_path):
    path = tmp_path / "r34.pt"
    torch.save(torchvision.models.resnet34().state_dict(), path)
    with pytest.raises(InvarianceError, match=r"do not fit torchvision:resnet18: unexpected keys layer1\.2\."):
        load_encoder("torchvision:resnet18", weights=path, device="cpu")
    odd = tmp_path / "odd.pt"
    state = torchvision.models.resnet18().state_dict()
    state["conv1.weight"] = torch.zeros(32, 3, 7, 7)
    torch.save(state, odd)
    with pytest.raises(InvarianceError, match=r"shape mismatch conv1\.weight \(32, 3, 7, 7\) vs \(64, 3, 7, 7\)"):
        load_encoder("torchvision:resnet18", weights=odd, device="cpu")


def test_missing_and_unreadable_weights_files(tmp_path):
    with pytest.raises(InvarianceError, match="file not found.*nope.pt"):
        load_encoder("torchvision:resnet18", weights=tmp_path / "nope.pt", device="cpu")
    junk = tmp_path / "junk.pt"
    junk.write_bytes(b"not a torch file")
    with pytest.raises(InvarianceError, match="cannot read weights file .*junk.pt") as err:
        load_encoder("torchvision:resnet18", weights=junk, device="cpu")
    assert "weights_only" not in str(err.value) and "\n" not in str(err.value)


def _plant_hub_file(tmp_path, monkeypatch, payload, *, honest_name=True):
    """Save ``payload`` where the loader looks for hub weights, named as torch.hub names
    cached files: ``<name>-<first 8 hex digits of its SHA-256>.pth`` (torch.hub.HASH_REGEX)."""
    from invariance.encoders import loaders

    folder = tmp_path / "torch" / "hub" / "checkpoints"
    folder.mkdir(parents=True, exist_ok=True)
    staged = folder / "staged.pth"
    torch.save(payload, staged)
    prefix = hashlib.sha256(staged.read_bytes()).hexdigest()[:8] if honest_name else "f37072fd"
    path = folder / f"resnet18-{prefix}.pth"
    staged.rename(path)
    monkeypatch.setattr(loaders, "_hub_file", lambda enum: path)
    return path


def test_hub_weights_load_only_from_local_cache(tmp_path, monkeypatch):
    monkeypatch.setenv("TORCH_HOME", str(tmp_path / "torch"))
    weights = torchvision.models.ResNet18_Weights.IMAGENET1K_V1
    with pytest.raises(InvarianceError, match="not in the local torch hub cache.*weights=FILE"):
        load_encoder("torchvision:resnet18@IMAGENET1K_V1", device="cpu")
    with torch.random.fork_rng():
        torch.manual_seed(3)
        source = torchvision.models.resnet18()
    cached = _plant_hub_file(tmp_path, monkeypatch, source.state_dict())
    for spec in ("torchvision:resnet18@IMAGENET1K_V1", "torchvision:resnet18@ResNet18_Weights.IMAGENET1K_V1"):
        enc = load_encoder(spec, device="cpu")
        torch.testing.assert_close(enc.module.layer2[0].conv1.weight, source.layer2[0].conv1.weight)
        assert enc.preprocess.describe() == Preprocess.from_weights(weights).describe()
        assert enc.weights_sha256 == hashlib.sha256(cached.read_bytes()).hexdigest()
    with pytest.raises(InvarianceError, match="no weights 'IMAGENET9K'.*@IMAGENET1K_V1"):
        load_encoder("torchvision:resnet18@IMAGENET9K", device="cpu")


def test_planted_hub_file_is_refused_by_its_hash_before_it_is_read(tmp_path, monkeypatch):
    # torch.hub checks a cached file's hash only when it downloads it; a file planted in the
    # cache under the published name must fail the SHA-256 prefix its name carries, and its
    # pickle must never run.
    monkeypatch.setenv("TORCH_HOME", str(tmp_path / "torch"))
    marker = tmp_path / "ran"
    _plant_hub_file(tmp_path, monkeypatch, {"conv1.weight": torch.zeros(1), "x": _MakesFolder(marker)},
                    honest_name=False)
    with pytest.raises(InvarianceError, match="SHA-256 starts .* not f37072fd.*planted"):
        load_encoder("torchvision:resnet18@IMAGENET1K_V1", device="cpu")
    assert not marker.exists()


# --------------------------------------------------------------------------- torchscript and python


@pytest.mark.filterwarnings("ignore::FutureWarning")  # torch.jit.trace/save are deprecated upstream
def test_torchscript_module_with_preprocess_metadata(tmp_path, pairs, user_file, monkeypatch):
    monkeypatch.syspath_prepend(str(user_file.parent))
    monkeypatch.delitem(sys.modules, "user_encoders", raising=False)
    import user_encoders

    model = user_encoders.Conv().eval()
    path = tmp_path / "conv.pt"
    info = {"image_size": SIZE, "mean": [0.5, 0.5, 0.5], "std": [0.2, 0.2, 0.2]}
    torch.jit.save(torch.jit.trace(model, torch.zeros(1, 3, SIZE, SIZE)), str(path),
                   _extra_files={"invariance_preprocess.json": json.dumps(info)})
    enc = load_encoder(f"torchscript:{path}", device="cpu")
    assert (enc.preprocess.crop, enc.preprocess.mean) == (SIZE, (0.5, 0.5, 0.5))
    assert enc.weights_sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    got = extract_features(pairs, enc, progress=False)["output"]
    with torch.inference_mode():
        expected = model(_reference_tensors(pairs, "clean", mean=info["mean"], std=info["std"])).mean(dim=(2, 3))
    np.testing.assert_allclose(got[0], expected.numpy(), rtol=1e-4, atol=1e-5)  # 4-D output average-pooled
    with torch.inference_mode():
        assert enc(torch.zeros(2, 3, SIZE, SIZE)).shape == (2, 6)  # calling the encoder pools too
    with pytest.raises(InvarianceError, match="TorchScript modules cannot be tapped"):
        extract_features(pairs, enc, ["conv"], progress=False)
    with pytest.raises(InvarianceError, match="file not found"):
        load_encoder(f"torchscript:{tmp_path / 'missing.pt'}", device="cpu")


def test_python_vit_class_token_and_block_taps(pairs, user_file):
    enc = load_encoder(f"python:{user_file}:tiny_vit", device="cpu")
    assert enc.preprocess.crop == SIZE and enc.preprocess.std == (0.25, 0.25, 0.25)
    feats = extract_features(pairs, enc, ["output", "encoder.layers.encoder_layer_0"], progress=False)
    vit = enc.module
    with torch.inference_mode():
        x = vit._process_input(_reference_tensors(pairs, "clean", mean=[0.5] * 3, std=[0.25] * 3))
        # Reference: torchvision VisionTransformer.forward and Encoder.forward.
        tokens = torch.cat([vit.class_token.expand(x.shape[0], -1, -1), x], dim=1) + vit.encoder.pos_embedding
        after0 = vit.encoder.layers[0](tokens)
        out = vit.encoder.ln(vit.encoder.layers[1](after0))[:, 0]
    np.testing.assert_allclose(feats["encoder.layers.encoder_layer_0"][0], after0[:, 0].numpy(), rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(feats["output"][0], out.numpy(), rtol=1e-4, atol=1e-5)


def test_python_module_name_form(pairs, user_file, monkeypatch):
    monkeypatch.syspath_prepend(str(user_file.parent))
    monkeypatch.delitem(sys.modules, "user_encoders", raising=False)
    enc = load_encoder("python:user_encoders:conv_net", device="cpu")
    assert enc.kind == "python" and enc.code_sha256 == hashlib.sha256(user_file.read_bytes()).hexdigest()
    clean, cluttered = extract_features(pairs, enc, progress=False)["output"]
    assert clean.shape == (len(pairs), 6)


@pytest.mark.parametrize(
    ("target", "message"),
    [
        ("broken", r"broken\(\) raised ValueError: no weights here"),
        ("not_a_module", r"not_a_module\(\) returned a int, not a torch.nn.Module"),
        ("missing_fn", "has no callable 'missing_fn'"),
    ],
)
def test_python_spec_failures_are_explained(user_file, target, message):
    with pytest.raises(InvarianceError, match=message):
        load_encoder(f"python:{user_file}:{target}", device="cpu")


def test_python_spec_missing_file_or_module(tmp_path):
    with pytest.raises(InvarianceError, match="file not found.*nowhere.py"):
        load_encoder(f"python:{tmp_path / 'nowhere.py'}:build", device="cpu")
    with pytest.raises(InvarianceError, match="cannot import module 'no_such_module_xyz'"):
        load_encoder("python:no_such_module_xyz:build", device="cpu")


def test_nan_output_names_the_images(pairs, user_file):
    enc = load_encoder(f"python:{user_file}:nan_net", device="cpu")
    with pytest.raises(InvarianceError, match="NaN or infinite features for images cluttered/scene_0.png") as err:
        extract_features(pairs, enc, progress=False)
    assert "\n" not in str(err.value)


def test_non_tensor_output_is_refused(pairs, user_file):
    enc = load_encoder(f"python:{user_file}:tuple_net", device="cpu")
    with pytest.raises(InvarianceError, match="returned a tuple, not a tensor for images clean/scene_0.png"):
        extract_features(pairs, enc, progress=False)


def test_images_too_small_for_the_network_suggest_image_size(pairs, user_file):
    enc = load_encoder(f"python:{user_file}:big_kernel", device="cpu")
    with pytest.raises(InvarianceError, match="failed on 32 px inputs.*larger image_size"):
        extract_features(pairs, enc, progress=False)
    with pytest.warns(FutureWarning), pytest.raises(InvarianceError, match="at least 75 px.*image_size=75"):
        # torchvision's metadata for inception_v3: min_size (75, 75).
        load_encoder("torchvision:inception_v3", device="cpu", image_size=64)


def test_unreadable_image_is_named(pairs, resnet18):
    pairs.cluttered[2].write_bytes(b"\x89PNG truncated")
    for workers in (0, 1):
        with pytest.raises(InvarianceError, match="scene_2.png") as err:
            extract_features(pairs, resnet18, progress=False, num_workers=workers)
        assert "\n" not in str(err.value)


PROJECT_MODULE = """
from torch import nn


def build_encoder():
    model = nn.Sequential(nn.Conv2d(3, 4, 3), nn.AdaptiveAvgPool2d(1), nn.Flatten())
    model.invariance_preprocess = {"image_size": 32}
    return model
"""

PROJECT_SCRIPT = """
from __future__ import annotations  # string annotations: dataclass looks the module up by name

from dataclasses import dataclass

from torch import nn

from widths import WIDTH  # a module next to this file


@dataclass
class Config:
    width: int = WIDTH


def build():
    model = nn.Sequential(nn.Conv2d(3, Config().width, 3), nn.AdaptiveAvgPool2d(1), nn.Flatten())
    model.invariance_preprocess = {"image_size": 32}
    return model
"""


@pytest.fixture
def project(tmp_path, monkeypatch):
    """A project folder made current but absent from the import path, as under the installed
    ``invariance`` command (whose import path starts at its script's folder)."""
    root = tmp_path / "project"
    (root / "my_pkg").mkdir(parents=True)
    (root / "my_pkg" / "__init__.py").write_text("")
    (root / "my_pkg" / "models.py").write_text(PROJECT_MODULE)
    (root / "scripts").mkdir()
    (root / "scripts" / "encoder.py").write_text(PROJECT_SCRIPT)
    (root / "scripts" / "widths.py").write_text("WIDTH = 5\n")
    monkeypatch.chdir(root)
    monkeypatch.setattr(sys, "path", [p for p in sys.path if p not in ("", ".", str(root), str(root / "scripts"))])
    yield root
    for name in ("my_pkg", "my_pkg.models", "widths"):
        sys.modules.pop(name, None)


def test_python_module_spec_is_found_in_the_current_folder(project, pairs):
    # `python -m` puts the current folder first on the import path (Python docs, "Command
    # line and environment", -m); a python: spec finds the user's module the same way.
    path_before = list(sys.path)
    enc = load_encoder("python:my_pkg.models:build_encoder", device="cpu")
    assert sys.path == path_before  # the folder was on the path only for that import
    assert enc.code_sha256 == hashlib.sha256((project / "my_pkg" / "models.py").read_bytes()).hexdigest()
    clean, cluttered = extract_features(pairs, enc, progress=False)["output"]
    assert clean.shape == cluttered.shape == (len(pairs), 4)


def test_python_file_spec_relative_to_the_current_folder(project):
    # `python path/to/file.py` puts the file's folder first on the import path (Python docs,
    # "The Module Search Path"), and the import system registers a module in sys.modules
    # while it runs (importlib docs, "Importing a source file directly"), which dataclasses need.
    path_before = list(sys.path)
    enc = load_encoder("python:scripts/encoder.py:build", device="cpu")
    assert sys.path == path_before
    assert enc.code_sha256 == hashlib.sha256((project / "scripts" / "encoder.py").read_bytes()).hexdigest()
    with torch.inference_mode():
        assert enc(torch.zeros(2, 3, SIZE, SIZE)).shape == (2, 5)


def test_messages_name_parameters_not_command_line_flags(tmp_path, pairs, resnet18, monkeypatch):
    monkeypatch.setenv("TORCH_HOME", str(tmp_path / "torch"))  # an empty hub cache
    junk = tmp_path / "w.pt"
    junk.write_bytes(b"x")
    calls = {
        "image_size": lambda: load_encoder("torchvision:resnet18", device="cpu", image_size=0),
        "weights": lambda: load_encoder("torchscript:m.pt", weights=junk, device="cpu"),
        "hub": lambda: load_encoder("torchvision:resnet18@IMAGENET1K_V1", device="cpu"),
        "both weights": lambda: load_encoder("torchvision:resnet18@IMAGENET1K_V1", weights=junk, device="cpu"),
        "missing weights": lambda: load_encoder("torchvision:resnet18", weights=tmp_path / "no.pt", device="cpu"),
        "layer": lambda: extract_features(pairs, resnet18, ["qqqqqqqqqqqq"], progress=False),
    }
    if not torch.cuda.is_available():
        calls["device"] = lambda: load_encoder("torchvision:resnet18", device="cuda")
    for what, call in calls.items():
        with pytest.raises(InvarianceError) as err:
            call()
        assert "--" not in str(err.value), what
    with pytest.raises(InvalidParameter, match="image_size=0 is not valid") as err:
        calls["image_size"]()
    assert err.value.parameter == "image_size"
    with pytest.raises(InvalidParameter, match="weights=.*only applies to torchvision") as err:
        calls["weights"]()
    assert err.value.parameter == "weights"


class _MakesFolder:
    """Unpickling it creates a folder: it stands for a pickle that runs arbitrary code."""

    def __init__(self, path):
        self.path = path

    def __reduce__(self):
        return (os.mkdir, (str(self.path),))


def _hub_file_with(tmp_path, monkeypatch, payload):
    monkeypatch.setenv("TORCH_HOME", str(tmp_path / "torch"))
    _plant_hub_file(tmp_path, monkeypatch, payload)  # a name that matches: the content is what is refused
    return "torchvision:resnet18@IMAGENET1K_V1", {}


def _weights_with(tmp_path, monkeypatch, payload):
    torch.save(payload, tmp_path / "w.pt")
    return "torchvision:resnet18", {"weights": tmp_path / "w.pt"}


def _checkpoint_with(tmp_path, monkeypatch, payload):
    torch.save({"format": encoders.CHECKPOINT_FORMAT, **payload}, tmp_path / "c.pt")
    return f"checkpoint:{tmp_path / 'c.pt'}", {}


def _python_loading(tmp_path, monkeypatch, payload):
    torch.save(payload, tmp_path / "p.pt")
    code = f"import torch\n\ndef build():\n    return torch.load({str(tmp_path / 'p.pt')!r}, weights_only=True)\n"
    (tmp_path / "loads.py").write_text(code)
    return f"python:{tmp_path / 'loads.py'}:build", {}


@pytest.mark.parametrize("make", [_hub_file_with, _weights_with, _checkpoint_with, _python_loading])
def test_pickled_objects_are_refused_without_torch_advice(tmp_path, monkeypatch, make):
    # torch.load(weights_only=True) refuses any global outside its allow-list (PyTorch docs,
    # torch.load); its message then advises weights_only=False, which would run the pickle.
    marker = tmp_path / "ran"
    payload = {"conv1.weight": torch.zeros(1), "extra": _MakesFolder(marker)}
    spec, kwargs = make(tmp_path, monkeypatch, payload)
    with pytest.raises(InvarianceError, match=r"pickled (posix|nt)\.mkdir.*never unpickles") as err:
        load_encoder(spec, device="cpu", **kwargs)
    message = str(err.value)
    assert not marker.exists()
    assert "weights_only" not in message and "trust" not in message
    assert "\x1b" not in message and "\n" not in message


# --------------------------------------------------------------------------- checkpoints


def test_checkpoint_round_trip(tmp_path, pairs, resnet18):
    module = load_encoder("torchvision:resnet18", device="cpu", image_size=SIZE).module
    with torch.no_grad():
        module.layer4[1].conv2.weight.mul_(0.5)
    path = save_checkpoint(tmp_path / "aligned.pt", encoder=resnet18, module=module, metadata={"steps": 3})
    enc = load_encoder(f"checkpoint:{path}", device="cpu")
    assert enc.arch == "resnet18" and enc.preprocess == resnet18.preprocess
    assert enc.describe()["weights_sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    got = extract_features(pairs, enc, ["output", "layer4"], progress=False)
    with torch.inference_mode():
        expected = _resnet_pooled(module, _reference_tensors(pairs, "clean")).numpy()
    np.testing.assert_allclose(got["output"][0], expected, rtol=1e-4, atol=1e-5)
    # A checkpoint of a checkpoint still names the original source.
    again = save_checkpoint(tmp_path / "again.pt", encoder=enc, module=enc.module, metadata={})
    assert torch.load(again, weights_only=True)["source_spec"] == "torchvision:resnet18"


def test_checkpoint_records_the_pairs_it_was_aligned_on(tmp_path, pairs, resnet18):
    # The scoring result can then warn when the checkpoint is scored on those same pairs.
    digest = pairs.content_hash()
    path = save_checkpoint(tmp_path / "a.pt", encoder=resnet18, module=resnet18.module,
                           metadata={"data_content_hash": digest})
    assert load_encoder(f"checkpoint:{path}", device="cpu").describe()["aligned_on"] == digest
    odd = save_checkpoint(tmp_path / "b.pt", encoder=resnet18, module=resnet18.module,
                          metadata={"data_content_hash": "\x1b[2J not a hash"})
    assert "aligned_on" not in load_encoder(f"checkpoint:{odd}", device="cpu").describe()  # never echoed


def test_checkpoint_of_python_module(tmp_path, pairs, user_file):
    enc = load_encoder(f"python:{user_file}:conv_net", device="cpu")
    path = save_checkpoint(tmp_path / "conv.ckpt", encoder=enc, module=enc.module, metadata={})
    # the checkpoint names user code as its source: refused unless that code is trusted by name
    with pytest.raises(InvarianceError, match=r"would import and run .*trusted_code=.*--trust-code"):
        load_encoder(f"checkpoint:{path}", device="cpu")
    back = load_encoder(f"checkpoint:{path}", device="cpu", trusted_code=[f"python:{user_file}:conv_net"])
    a = extract_features(pairs, enc, progress=False)["output"]
    b = extract_features(pairs, back, progress=False)["output"]
    np.testing.assert_array_equal(a[0], b[0])


def test_checkpoint_naming_planted_code_never_runs_it(tmp_path, resnet18):
    # A checkpoint whose stored source points at a file: the file must not be imported.
    marker = tmp_path / "ran"
    (tmp_path / "payload.py").write_text(f"open({str(marker)!r}, 'w').write('x')\ndef build():\n    pass\n")
    path = save_checkpoint(tmp_path / "c.pt", encoder=resnet18, module=resnet18.module, metadata={})
    ckpt = torch.load(path, weights_only=True)
    ckpt["source_spec"] = f"python:{tmp_path / 'payload.py'}:build"
    torch.save(ckpt, path)
    with pytest.raises(InvarianceError, match="payload.py"):
        load_encoder(f"checkpoint:{path}", device="cpu")
    assert not marker.exists()


@pytest.mark.parametrize("code", ["import sys\nsys.exit(0)\n", "import sys\ndef build():\n    sys.exit(0)\n"])
def test_user_code_that_exits_is_an_error_not_an_exit(tmp_path, code):
    # SystemExit from a builder or its module used to end the run with status 0 and no gate
    (tmp_path / "exits.py").write_text(code + "def build2():\n    pass\n")
    name = "build" if "def build()" in code else "build2"
    with pytest.raises(InvarianceError, match="exits.py|build"):
        load_encoder(f"python:{tmp_path / 'exits.py'}:{name}", device="cpu")
    with pytest.raises(InvarianceError, match="exit"):
        load_encoder("python:sys:exit", device="cpu")


def test_checkpoint_errors(tmp_path, resnet18):
    path = save_checkpoint(tmp_path / "c.pt", encoder=resnet18, module=resnet18.module, metadata={})
    ckpt = torch.load(path, weights_only=True)
    ckpt["arch"] = "resnet34"
    torch.save(ckpt, tmp_path / "arch.pt")
    with pytest.raises(InvarianceError, match="saved from architecture 'resnet34'"):
        load_encoder(f"checkpoint:{tmp_path / 'arch.pt'}", device="cpu")
    torch.save({"format": "something/else"}, tmp_path / "other.pt")
    with pytest.raises(InvarianceError, match="not an invariance checkpoint"):
        load_encoder(f"checkpoint:{tmp_path / 'other.pt'}", device="cpu")
    with pytest.raises(InvarianceError, match="metadata must be a dict"):
        save_checkpoint(tmp_path / "x.pt", encoder=resnet18, module=resnet18.module, metadata=[1])
    assert not (tmp_path / "x.pt").exists()


# --------------------------------------------------------------------------- devices and parameters


def test_resolve_device():
    assert encoders.resolve_device("cpu") == torch.device("cpu")
    assert encoders.resolve_device("auto").type == ("cuda" if torch.cuda.is_available() else "cpu")
    with pytest.raises(InvarianceError, match="not one of auto, cpu, cuda"):
        encoders.resolve_device("gpu")
    if not torch.cuda.is_available():
        with pytest.raises(InvarianceError, match="no CUDA device.*device='cpu'"):
            encoders.resolve_device("cuda")


def test_extract_parameters_are_validated(pairs, resnet18):
    with pytest.raises(InvarianceError, match="batch_size=1 is not valid; pass an integer from 2"):
        extract_features(pairs, resnet18, options=ExtractionOptions(batch_size=1))
    with pytest.raises(InvarianceError, match="num_workers must be an integer >= 0"):
        extract_features(pairs, resnet18, num_workers=-1)
    with pytest.raises(InvarianceError, match="non-empty list of node names"):
        extract_features(pairs, resnet18, layers="layer1")
    with pytest.raises(InvarianceError, match="no image pairs"):
        extract_features(pairs.subset([]), resnet18)
    with pytest.raises(InvarianceError, match="image_size=0 is not valid"):
        load_encoder("torchvision:resnet18", device="cpu", image_size=0)
