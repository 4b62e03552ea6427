"""The demo encoders: architecture, shipped weights, preprocessing and what they have learnt."""

from __future__ import annotations

import hashlib

import pytest
import torch

from invariance import zoo
from invariance.errors import InvarianceError

torch.set_num_threads(min(2, torch.get_num_threads()))  # a shared 2-core machine


def test_workbench_cnn_is_a_plain_sequence_of_named_stages():
    net = zoo.workbench_cnn().eval()
    assert [name for name, _ in net.named_children()] == ["stem", "block1", "block2", "block3", "pool", "flatten"]
    x = torch.randn(2, 3, 64, 64)
    with torch.no_grad():
        out = net(x)
        manual = x
        for stage in net.children():
            manual = stage(manual)
    assert out.shape == (2, 128)
    assert torch.equal(out, manual)
    assert zoo.workbench_cnn(16).eval()(x).shape == (2, 64)
    assert net.invariance_preprocess == {"image_size": 64, "mean": (0.5,) * 3, "std": (0.25,) * 3}


@pytest.mark.parametrize("width", [0, 3, 1000, True, "32", 8.0])
def test_workbench_cnn_refuses_a_bad_width(width):
    with pytest.raises(InvarianceError, match="width="):
        zoo.workbench_cnn(width)


@pytest.mark.parametrize("name", sorted(zoo.SHIPPED_WEIGHTS))
def test_shipped_weights_match_their_recorded_sha256(name):
    # Reference: hashlib's SHA-256 of the file on disk against the table.
    entry = zoo.SHIPPED_WEIGHTS[name]
    path = zoo.WEIGHTS_DIR / entry["file"]
    assert hashlib.sha256(path.read_bytes()).hexdigest() == entry["sha256"]
    assert path.stat().st_size < 2_000_000


def test_builders_load_the_shipped_weights_in_eval_mode():
    for builder, name in ((zoo.clean_only_encoder, "clean_only"), (zoo.clutter_augmented_encoder, "clutter_augmented")):
        net = builder()
        assert not net.training
        stored = torch.load(zoo.WEIGHTS_DIR / zoo.SHIPPED_WEIGHTS[name]["file"], weights_only=True)
        loaded = net.state_dict()
        assert all(torch.equal(loaded[k], v.to(loaded[k].dtype)) for k, v in stored.items())
    a, b = zoo.clean_only_encoder().state_dict(), zoo.clutter_augmented_encoder().state_dict()
    assert not torch.equal(a["block3.0.weight"], b["block3.0.weight"])


def test_loader_preprocessing_equals_the_training_normalisation():
    # Training normalises rendered arrays in memory; the encoder loader reads PNG files
    # through PIL. Both must give the same tensor, or the shipped weights see other inputs.
    from PIL import Image

    from invariance.encoders import load_encoder
    from invariance.scenes import pair_rng, render_pair
    from invariance.train_demo import _normalise

    clean, cluttered, _ = render_pair(pair_rng(99, 0), 64)
    encoder = load_encoder("python:invariance.zoo:clean_only_encoder", device="cpu")
    for image in (clean, cluttered):
        via_loader = encoder.preprocess(Image.fromarray(image))
        assert torch.allclose(via_loader, _normalise(image[None])[0], atol=1e-6)


def _probe(net, train, test, view):
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    with torch.no_grad():
        f_train, f_test = net(train["clean"]).numpy(), net(test[view]).numpy()
    model = make_pipeline(StandardScaler(), LogisticRegression(max_iter=2000)).fit(f_train, train["part"].numpy())
    return model.score(f_test, test["part"].numpy())


def test_shipped_encoders_know_the_part_and_differ_under_clutter():
    # Linear probe (scikit-learn logistic regression) on part kind, 5 classes (chance 0.2),
    # fitted on clean views of scenes neither encoder was trained on (seeds 31 and 32).
    from invariance.train_demo import render_dataset

    train, test = render_dataset(300, seed=31), render_dataset(200, seed=32)
    clean_only, augmented = zoo.clean_only_encoder(), zoo.clutter_augmented_encoder()
    assert _probe(clean_only, train, test, "clean") >= 0.8
    assert _probe(augmented, train, test, "clean") >= 0.8
    # Clutter hurts the clean-only encoder more: the demo's point.
    assert _probe(augmented, train, test, "cluttered") > _probe(clean_only, train, test, "cluttered") + 0.1


def test_weights_of_another_architecture_are_refused(tmp_path, monkeypatch):
    import torchvision

    torch.save(torchvision.models.resnet18(weights=None).state_dict(), tmp_path / "workbench_clean_only.pt")
    monkeypatch.setattr(zoo, "WEIGHTS_DIR", tmp_path)
    monkeypatch.setitem(zoo.SHIPPED_WEIGHTS, "clean_only", {**zoo.SHIPPED_WEIGHTS["clean_only"], "sha256": None})
    with pytest.raises(InvarianceError, match="workbench_clean_only.pt: weights do not fit workbench_cnn"):
        zoo.clean_only_encoder()


def test_missing_or_altered_weights_say_how_to_retrain(tmp_path, monkeypatch):
    monkeypatch.setattr(zoo, "WEIGHTS_DIR", tmp_path)
    with pytest.raises(InvarianceError, match="missing; run `python -m invariance.train_demo --out invariance/weights`"):
        zoo.clutter_augmented_encoder()
    (tmp_path / "workbench_clutter_aug.pt").write_bytes(b"not the shipped file")
    with pytest.raises(InvarianceError, match="SHA-256 differs"):
        zoo.clutter_augmented_encoder()


def test_train_demo_refuses_too_few_pairs(tmp_path, capsys):
    from invariance.train_demo import main

    assert main(["--out", str(tmp_path), "--pairs", "10"]) == 1
    assert "--pairs 10 is too few" in capsys.readouterr().err
    assert not any(tmp_path.iterdir())


# ---------------------------------------------------------------- alignment panel architectures


@pytest.mark.parametrize("builder, size, dim", [("sequential_cnn", 64, 64), ("digits_cnn", 32, 64),
                                                ("resnet18_64", 64, 512), ("small_vit", 64, 64)])
def test_panel_architectures_give_pooled_features_at_their_size(builder, size, dim):
    from invariance import zoo

    net = getattr(zoo, builder)().eval()
    assert net.invariance_preprocess["image_size"] == size
    with torch.no_grad():
        out = net(torch.randn(2, 3, size, size))
    assert out.shape == (2, dim)


def test_panel_architectures_leave_the_global_random_state_alone_and_repeat():
    from invariance import zoo

    state = torch.get_rng_state()
    a, b = zoo.small_vit(), zoo.small_vit()
    assert torch.equal(torch.get_rng_state(), state)
    assert all(torch.equal(p, q) for p, q in zip(a.parameters(), b.parameters()))


def test_sequential_cnn_has_integer_named_children_and_the_vit_is_not_a_chain():
    # The two shapes of encoder the alignment must split: an nn.Sequential with children
    # "0".."9", and a ViT whose forward adds a class token between its children.
    from invariance import zoo

    assert [n for n, _ in zoo.sequential_cnn().named_children()] == [str(i) for i in range(10)]
    vit = zoo.small_vit().eval()
    x = torch.randn(1, 3, 64, 64)
    with pytest.raises(Exception):
        h = x
        for child in vit.children():
            h = child(h)
