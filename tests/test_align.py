"""Adversarial alignment: gradient reversal, DANN schedules, splits, trunk/tail, end to end."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from torch import nn

from invariance import SAFETY_CAUTION
from invariance import align
from invariance.align import (
    AlignmentInterrupted,
    GradientReversal,
    align_encoder,
    dann_lambda,
    dann_learning_rate,
    gradient_reversal,
    split_module,
    split_pairs,
    validation_slice,
)
from invariance.errors import InvarianceError

torch.set_num_threads(min(2, torch.get_num_threads()))  # a shared 2-core machine

QUICK = {"steps": 6, "batch_size": 8, "permutations": 20, "progress": False}


# ---------------------------------------------------------------- gradient reversal


def test_gradient_reversal_forward_is_identity():
    x = torch.randn(5, 7)
    assert torch.equal(gradient_reversal(x, 0.7), x)
    assert torch.equal(GradientReversal(2.0)(x), x)


@pytest.mark.parametrize("lam", [0.0, 0.3, 1.0, 2.5])
def test_gradient_reversal_backward_matches_scaling_by_minus_lambda(lam):
    # Reference: the gradient reversal layer passes -lambda * upstream gradient backwards
    # (Ganin & Lempitsky, ICML 2015, sec. 3.2; Ganin et al., JMLR 2016, eq. 16-17).
    # gradcheck compares the analytic backward with finite differences of the forward, so
    # we compose the layer with a known scaling: the forward value below is exactly
    # -lambda * x (Jacobian -lambda I) while every gradient flows through the layer alone.
    # gradcheck passes only if the layer's backward is -lambda times the upstream gradient.
    def composed(x):
        return gradient_reversal(x, lam) - x.detach() - lam * x.detach()

    x = torch.randn(4, 3, dtype=torch.float64, requires_grad=True)
    assert torch.autograd.gradcheck(composed, (x,), eps=1e-6, atol=1e-8)


def test_gradient_reversal_gradcheck_rejects_a_wrong_sign():
    # The same gradcheck fails when the reference scaling has the other sign, so the
    # previous test can fail.
    def composed(x):
        return gradient_reversal(x, 0.5) - x.detach() + 0.5 * x.detach()

    x = torch.randn(3, 2, dtype=torch.float64, requires_grad=True)
    assert not torch.autograd.gradcheck(composed, (x,), eps=1e-6, atol=1e-8, raise_exception=False)


def test_gradient_reversal_through_a_discriminator_flips_and_scales_feature_gradients():
    # Reference: torch.autograd on the same discriminator without the layer (JMLR eq. 16-17).
    torch.manual_seed(0)
    disc = nn.Sequential(nn.Linear(6, 4), nn.ReLU(), nn.Linear(4, 1))
    feats = torch.randn(10, 6, requires_grad=True)
    y = torch.randint(0, 2, (10,)).float()
    loss = nn.functional.binary_cross_entropy_with_logits(disc(feats).squeeze(1), y)
    (plain,) = torch.autograd.grad(loss, feats)
    loss_rev = nn.functional.binary_cross_entropy_with_logits(disc(gradient_reversal(feats, 0.4)).squeeze(1), y)
    (reversed_,) = torch.autograd.grad(loss_rev, feats)
    assert torch.allclose(reversed_, -0.4 * plain, atol=1e-7)


def test_dann_lambda_follows_the_published_schedule():
    # Ganin et al., JMLR 2016, sec. 5.2.2: lambda_p = 2 / (1 + exp(-gamma p)) - 1, gamma = 10.
    assert dann_lambda(0.0) == 0.0
    assert dann_lambda(0.5) == pytest.approx(2 / (1 + math.exp(-5)) - 1)
    assert dann_lambda(0.5) == pytest.approx(0.98661, abs=1e-5)
    assert dann_lambda(1.0) == pytest.approx(0.99991, abs=1e-5)
    values = [dann_lambda(p) for p in np.linspace(0, 1, 11)]
    assert all(a < b for a, b in zip(values, values[1:]))


def test_dann_learning_rate_follows_the_published_schedule():
    # Ganin et al., JMLR 2016, sec. 5.2.2: mu_p = mu_0 / (1 + alpha p)^beta, 0.01, 10, 0.75.
    assert dann_learning_rate(0.0) == pytest.approx(0.01)
    assert dann_learning_rate(1.0) == pytest.approx(0.01 / 11**0.75)
    assert dann_learning_rate(1.0) == pytest.approx(0.0016556, abs=1e-7)


@pytest.mark.parametrize("p", [-0.1, 1.5, float("nan"), "0.5"])
def test_dann_schedules_refuse_progress_outside_zero_one(p):
    with pytest.raises(InvarianceError, match="p="):
        dann_lambda(p)


# ---------------------------------------------------------------- splits


def test_split_pairs_is_disjoint_complete_and_seeded():
    align_idx, held = split_pairs(100, held_out_fraction=0.3, seed=3)
    assert len(held) == 30 and len(align_idx) == 70
    assert set(align_idx).isdisjoint(held)
    assert sorted(np.r_[align_idx, held]) == list(range(100))
    again = split_pairs(100, held_out_fraction=0.3, seed=3)
    assert np.array_equal(again[1], held)
    assert not np.array_equal(split_pairs(100, held_out_fraction=0.3, seed=4)[1], held)


def test_validation_slice_is_inside_the_alignment_pairs():
    align_idx, held = split_pairs(100, seed=0)
    train, val = validation_slice(align_idx, seed=0)
    assert set(train) | set(val) == set(align_idx)
    assert set(train).isdisjoint(val)
    assert set(val).isdisjoint(held)
    assert len(val) == round(70 * align.VALIDATION_FRACTION)


def test_split_pairs_names_the_minimum_when_too_few_pairs():
    minimum = align._minimum_pairs(0.3)
    split_pairs(minimum)  # exactly the minimum works
    with pytest.raises(InvarianceError, match=f"at least {minimum} pairs"):
        split_pairs(minimum - 1)


# ---------------------------------------------------------------- trunk / tail


def _zoo_like():
    from invariance.zoo import workbench_cnn

    torch.manual_seed(0)
    return workbench_cnn(8).eval()


def test_split_module_reproduces_the_encoder_and_defaults_to_the_last_stage():
    net = _zoo_like()
    x = torch.randn(3, 3, 64, 64)
    trunk, tail, node = split_module(net, None, x)
    assert node == "block3"
    with torch.no_grad():
        assert torch.allclose(tail(trunk(x)), net(x), atol=1e-6)
    assert all(any(p is q for q in net.block3.parameters()) for p in tail.parameters())


def test_split_module_handles_torchvision_resnet_with_identity_head():
    import torchvision

    net = torchvision.models.resnet18(weights=None)
    net.fc = nn.Identity()
    net.eval()
    x = torch.randn(2, 3, 64, 64)
    trunk, tail, node = split_module(net, None, x)
    assert node == "layer4"
    with torch.no_grad():
        assert torch.allclose(tail(trunk(x)), net(x), atol=1e-5)


class _Residual(nn.Module):
    """Its forward is not the sequence of its children (a skip around ``body``)."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 4, 3, padding=1)
        self.body = nn.Conv2d(4, 4, 3, padding=1)
        self.pool = nn.AdaptiveAvgPool2d(1)

    def forward(self, x):
        h = self.stem(x)
        return torch.flatten(self.pool(h + self.body(h)), 1)


def test_split_module_refuses_an_encoder_whose_forward_is_not_its_children():
    with pytest.raises(InvarianceError, match="cannot be split there.*stem, body, pool"):
        split_module(_Residual().eval(), "body", torch.randn(2, 3, 16, 16))


def test_split_module_refuses_unknown_stage_and_stage_without_parameters():
    net = _zoo_like()
    x = torch.randn(2, 3, 64, 64)
    with pytest.raises(InvarianceError, match="not a top-level stage.*stem, block1, block2, block3, pool, flatten"):
        split_module(net, "layer4", x)
    with pytest.raises(InvarianceError, match="no trainable parameters"):
        split_module(net, "pool", x)


def test_guard_allows_noise_but_stops_a_real_fall():
    kinds = {"part": "classification", "x": "regression"}
    # 0.9 -> 0.85 on 50 images is inside sampling noise; 0.9 -> 0.6 is not.
    assert align._guard_failure({"part": 0.9}, {"part": 0.85}, 0.05, kinds, 50) is None
    assert "part" in align._guard_failure({"part": 0.9}, {"part": 0.6}, 0.05, kinds, 50)
    # A regression R^2 uses the relative margin alone: 0.8 -> 0.77 passes, 0.8 -> 0.75 stops.
    assert align._guard_failure({"x": 0.8}, {"x": 0.77}, 0.05, kinds, 50) is None
    assert "x" in align._guard_failure({"x": 0.8}, {"x": 0.75}, 0.05, kinds, 50)
    # A regression probe that started uninformative (R^2 <= 0) is not guarded.
    assert align._guard_failure({"x": -0.2}, {"x": -0.9}, 0.05, kinds, 50) is None


def _identity_run(clean, cluttered):
    n = len(clean)
    train_pos = np.arange(n - 2)
    head_input = (torch.zeros(clean.shape[1]), 1.0)
    return align._Run(nn.Identity(), clean, cluttered, train_pos, np.arange(n - 2, n), [], head_input, 0)


def test_paired_loss_divides_each_feature_by_its_clean_variance():
    # Reference: the mean over pairs and features of (cluttered - clean)^2 / var_j, var_j the
    # unbiased variance of feature j over the training pairs' original clean features
    # (per-feature standardisation, common practice), floored at PAIRED_VARIANCE_FLOOR of
    # the mean variance; computed here with numpy. The last feature is nearly constant on
    # clean scenes, so the floor decides its divisor.
    rng = np.random.default_rng(0)
    clean = rng.normal(size=(12, 5)) * np.array([0.5, 1.0, 3.0, 2.0, 1e-4])
    cluttered = clean + rng.normal(size=(12, 5))
    run = _identity_run(torch.tensor(clean, dtype=torch.float32), torch.tensor(cluttered, dtype=torch.float32))
    batch = np.array([0, 3, 4, 7])
    var = clean[:10].var(axis=0, ddof=1)
    floor = align.PAIRED_VARIANCE_FLOOR * var.mean()
    assert var[-1] < floor < var[:-1].min()  # the case covers both branches
    var = np.maximum(var, floor)
    expected = ((cluttered[batch] - clean[batch]) ** 2 / var).mean()
    weights = {"anchor": 1.0, "task": 1.0, "paired": 1.0, "mean": 1.0}
    got = float(run.losses(batch, 0.0, weights)["paired"])
    assert got == pytest.approx(expected, rel=1e-5)


def test_paired_loss_does_not_depend_on_a_feature_scale():
    # Rescaling one feature (clean and cluttered alike) leaves a standardised loss unchanged,
    # whereas a loss divided by the mean variance would change (the floor stays below every
    # feature's variance here).
    rng = np.random.default_rng(1)
    clean = rng.normal(size=(12, 4))
    cluttered = clean + rng.normal(size=(12, 4))
    scale = np.array([1.0, 1.0, 1.0, 5.0])
    weights = {"anchor": 1.0, "task": 1.0, "paired": 1.0, "mean": 1.0}
    batch = np.arange(8)
    losses = [
        float(_identity_run(torch.tensor(c * k, dtype=torch.float32), torch.tensor(x * k, dtype=torch.float32))
              .losses(batch, 0.0, weights)["paired"])
        for c, x, k in ((clean, cluttered, 1.0), (clean, cluttered, scale))
    ]
    assert losses[1] == pytest.approx(losses[0], rel=1e-4)


def test_whitening_inverts_the_ledoit_wolf_covariance():
    # Reference: scikit-learn's LedoitWolf (Ledoit & Wolf, J. Multivariate Analysis 2004)
    # and its precision_ (the inverse covariance); W @ W.T must equal it. 20 images of 30
    # features: the sample covariance is singular, the shrunk one is not.
    from sklearn.covariance import LedoitWolf

    features = np.random.default_rng(2).normal(size=(20, 30)) * np.linspace(0.1, 3.0, 30)
    w = align._whitening(torch.tensor(features, dtype=torch.float32)).double().numpy()
    precision = LedoitWolf().fit(features).precision_
    assert np.allclose(w @ w.T, precision, rtol=1e-3, atol=1e-3 * np.abs(precision).max())


def test_mean_matching_loss_is_the_squared_mahalanobis_distance_of_the_means():
    # Reference: scipy.spatial.distance.mahalanobis with VI the inverse of scikit-learn's
    # Ledoit-Wolf covariance of the original clean features; the loss is its square divided
    # by the feature dimension (linear-kernel MMD^2 of whitened features, Gretton et al.,
    # JMLR 2012, section 2).
    from scipy.spatial.distance import mahalanobis
    from sklearn.covariance import LedoitWolf

    rng = np.random.default_rng(3)
    clean = rng.normal(size=(40, 6)) @ rng.normal(size=(6, 6))  # correlated features
    cluttered = clean + rng.normal(size=(40, 6)) + np.array([0.5, 0.0, -0.3, 0.0, 0.2, 1.0])
    run = _identity_run(torch.tensor(clean, dtype=torch.float32), torch.tensor(cluttered, dtype=torch.float32))
    batch = np.array([1, 4, 5, 9, 17, 22, 30])
    vi = LedoitWolf().fit(clean[run.train_pos]).precision_
    expected = mahalanobis(cluttered[batch].mean(0), clean[batch].mean(0), vi) ** 2 / clean.shape[1]
    got = float(run.losses(batch, 0.0, {"anchor": 1.0, "task": 1.0, "paired": 1.0, "mean": 1.0})["mean"])
    assert got == pytest.approx(expected, rel=1e-3)
    # Identical views have identical means: no loss.
    same = _identity_run(torch.tensor(clean, dtype=torch.float32), torch.tensor(clean, dtype=torch.float32))
    assert float(same.losses(batch, 0.0, {"anchor": 1.0, "task": 1.0, "paired": 1.0, "mean": 1.0})["mean"]) == 0.0


def test_mean_term_follows_the_dann_ramp():
    # The mean term is weighted by lambda_p like the domain term (Ganin et al., JMLR 2016,
    # sec. 5.2.2): absent at lambda 0, mean_weight * lambda * mean otherwise.
    rng = np.random.default_rng(4)
    clean = rng.normal(size=(16, 5))
    run = _identity_run(torch.tensor(clean, dtype=torch.float32), torch.tensor(clean + 0.7, dtype=torch.float32))
    batch = np.arange(8)
    base = {"anchor": 1.0, "task": 1.0, "paired": 1.0}
    for lam in (0.0, 0.4, 1.0):
        with torch.no_grad():
            with_mean = run.losses(batch, lam, {**base, "mean": 5.0})
            without = run.losses(batch, lam, {**base, "mean": 0.0})
        expected = float(without["total"]) + 5.0 * lam * float(with_mean["mean"])
        assert float(with_mean["mean"]) > 0
        assert float(with_mean["total"]) == pytest.approx(expected, rel=1e-5)


# ---------------------------------------------------------------- end to end (small)


@pytest.fixture(scope="module")
def small_set(tmp_path_factory):
    from invariance.data import discover_pairs
    from invariance.scenes import generate_scenes

    root = tmp_path_factory.mktemp("scenes") / "set"
    generate_scenes(root, pairs=40, size=64, seed=11, level=3)
    return discover_pairs(root)


@pytest.fixture(scope="module")
def random_zoo_encoder():
    from invariance.encoders import load_encoder

    return load_encoder("python:invariance.zoo:workbench_cnn", device="cpu")


@pytest.fixture(scope="module")
def two_runs(small_set, random_zoo_encoder, tmp_path_factory):
    """The same small alignment twice (same seed), the first with its batches recorded."""
    folder = tmp_path_factory.mktemp("runs")
    fed = []
    first = align_encoder(small_set, random_zoo_encoder, out=folder / "a.pt", batch_callback=fed.append, **QUICK)
    second = align_encoder(small_set, random_zoo_encoder, out=folder / "b.pt", **QUICK)
    return {"fed": np.concatenate(fed), "first": first, "second": second, "folder": folder}


def test_held_out_and_validation_pairs_never_reach_the_training_loop(small_set, two_runs):
    fed, result = two_runs["fed"], two_runs["first"]
    align_idx, held = split_pairs(len(small_set), seed=0)
    train, val = validation_slice(align_idx, seed=0)
    assert result["held_out_indices"] == held.tolist()
    assert len(fed) == QUICK["steps"] * QUICK["batch_size"]
    assert set(fed) <= set(train)
    assert set(fed).isdisjoint(held) and set(fed).isdisjoint(val)
    assert result["held_out_pairs"] == len(held) and result["align_pairs"] == len(align_idx)


def test_same_seed_gives_the_same_numbers_and_weights(two_runs):
    first, second = two_runs["first"], two_runs["second"]
    assert first["curves"] == second["curves"]
    assert first["after"]["paired_drift"] == second["after"]["paired_drift"]
    a = torch.load(two_runs["folder"] / "a.pt", weights_only=True)["state_dict"]
    b = torch.load(two_runs["folder"] / "b.pt", weights_only=True)["state_dict"]
    assert all(torch.equal(a[k], b[k]) for k in a)


def test_checkpoint_reloads_as_the_trained_encoder(small_set, random_zoo_encoder, two_runs):
    from invariance.encoders import load_encoder

    out, result = two_runs["folder"] / "a.pt", two_runs["first"]
    meta = torch.load(out, weights_only=True)["metadata"]
    assert meta["source_spec"] == "python:invariance.zoo:workbench_cnn"
    assert meta["settings"]["train_from"] == "block3" and meta["data_content_hash"] == small_set.content_hash()
    assert meta["held_out_indices"] == result["held_out_indices"]
    reloaded = load_encoder(f"checkpoint:{out}", device="cpu")
    original, trained = random_zoo_encoder.module.state_dict(), reloaded.module.state_dict()
    assert all(torch.equal(original[k], trained[k]) for k in original if not k.startswith("block3"))
    if result["best_step"] > 0:  # the kept state is a trained one: block3 moved
        assert any(not torch.equal(original[k], trained[k]) for k in original if k.startswith("block3"))
    curves = result["curves"]
    assert len({len(v) for v in curves.values()}) == 1 and curves["step"][0] == 0


def test_interrupt_saves_the_best_state_so_far_and_reraises(small_set, random_zoo_encoder, tmp_path):
    calls = []

    def interrupt_on_third(batch):
        calls.append(batch)
        if len(calls) == 3:
            raise KeyboardInterrupt

    out = tmp_path / "interrupted.pt"
    with pytest.raises(AlignmentInterrupted) as info:
        align_encoder(small_set, random_zoo_encoder, out=out, batch_callback=interrupt_on_third, **QUICK)
    assert info.value.checkpoint == out and out.is_file()
    assert isinstance(info.value, KeyboardInterrupt)
    meta = torch.load(out, weights_only=True)["metadata"]
    assert meta["stopped_because"] == "interrupted" and meta["steps_run"] == 2


def test_too_few_pairs_is_refused_without_a_checkpoint(small_set, random_zoo_encoder, tmp_path):
    out = tmp_path / "never.pt"
    with pytest.raises(InvarianceError, match="at least 34 pairs"):
        align_encoder(small_set.subset(range(20)), random_zoo_encoder, out=out, **QUICK)
    assert not out.exists()


def test_stage_without_parameters_is_refused_without_a_checkpoint(small_set, random_zoo_encoder, tmp_path):
    out = tmp_path / "never.pt"
    with pytest.raises(InvarianceError, match="--train-from pool: no trainable parameters"):
        align_encoder(small_set, random_zoo_encoder, out=out, train_from="pool", **QUICK)
    assert not out.exists()


def test_labels_that_do_not_match_the_pairs_are_refused(small_set, random_zoo_encoder, tmp_path):
    import copy

    broken = copy.deepcopy(small_set)
    broken.labels.tasks["part"] = broken.labels.tasks["part"][:-3]
    with pytest.raises(InvarianceError, match="labels.csv: column 'part' has 37 rows for 40 pairs"):
        align_encoder(broken, random_zoo_encoder, out=tmp_path / "never.pt", **QUICK)
    assert not (tmp_path / "never.pt").exists()


@pytest.mark.parametrize(
    "option, value",
    [("steps", 0), ("batch_size", 1), ("minutes", -1.0), ("anchor_weight", -0.5), ("mean_weight", -1.0),
     ("learning_rate", 2.0), ("held_out_fraction", 0.95)],
)
def test_invalid_options_name_the_option(small_set, random_zoo_encoder, tmp_path, option, value):
    with pytest.raises(InvarianceError, match=f"{option}="):
        align_encoder(small_set, random_zoo_encoder, out=tmp_path / "x.pt", **{**QUICK, option: value})


# ---------------------------------------------------------------- acceptance


def _figures(metrics: dict) -> dict:
    out = {
        "domain_accuracy": metrics["domain_classifier"]["accuracy"],
        "relative_drift": metrics["paired_drift"]["relative_drift"],
    }
    for task, probe in metrics["probe"].items():
        if isinstance(probe, dict) and "clean" in probe:
            out[f"probe.{task}.clean"] = probe["clean"]
            out[f"probe.{task}.cluttered"] = probe["cluttered"]
    return out


@pytest.mark.slow
def test_acceptance_on_workbench_scenes(tmp_path):
    """The clean-only demo encoder, its last block aligned on 300 generated pairs (level 3)."""
    import time

    from invariance.data import discover_pairs
    from invariance.encoders import load_encoder
    from invariance.scenes import generate_scenes

    generate_scenes(tmp_path / "set", pairs=300, size=64, seed=7, level=3)
    pairs = discover_pairs(tmp_path / "set")
    encoder = load_encoder("python:invariance.zoo:clean_only_encoder", device="cpu")
    start = time.perf_counter()
    # The default settings (800 steps, 40-60 s of training on 2 cores); the 3-minute
    # limit caps a busy machine.
    result = align_encoder(pairs, encoder, out=tmp_path / "aligned.pt", train_from="block3",
                           minutes=3.0, permutations=200, progress=False)
    minutes = (time.perf_counter() - start) / 60
    before, after = _figures(result["before"]), _figures(result["after"])
    print(f"\nalignment of block3 on {result['align_pairs']} pairs, measured on {result['held_out_pairs']} "
          f"held-out pairs: {result['steps_run']} steps, best step {result['best_step']}, "
          f"{result['seconds'] / 60:.2f} min training, {minutes:.2f} min in all ({result['stopped_because']})")
    for key in before:
        print(f"  {key:28s} before {before[key]:7.3f}  after {after[key]:7.3f}")
    print(SAFETY_CAUTION)

    assert result["seconds"] <= 3.0 * 60 + 30  # the minutes limit holds (one validation may overrun)
    # Probes whose clean score starts above zero carry information (R^2 <= 0 predicts
    # nothing, e.g. the angle, which the demo encoders were not trained on).
    informative = [k[len("probe."):-len(".clean")] for k in before if k.endswith(".clean") and before[k] > 0]
    assert {"part", "x", "y"} <= set(informative)
    for task in informative:
        assert after[f"probe.{task}.clean"] >= 0.95 * before[f"probe.{task}.clean"], task
        assert after[f"probe.{task}.cluttered"] >= before[f"probe.{task}.cluttered"], task
    # Issue targets: at least a 30% drift drop and a 0.15 (absolute) drop of the held-out
    # domain-classifier accuracy. Measured with the defaults: 0.989 -> 0.683, drift 1.14 ->
    # 0.56; without the mean-matching term the accuracy only reached 0.956.
    assert after["relative_drift"] <= 0.7 * before["relative_drift"]
    assert after["domain_accuracy"] <= before["domain_accuracy"] - 0.15
