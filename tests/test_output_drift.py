"""Output drift of a whole policy, in the output's units: figures, tolerances, bad outputs, a real policy."""

from __future__ import annotations

import textwrap

import numpy as np
import pytest

from invariance import SAFETY_CAUTION
from invariance.errors import InvalidParameter, InvarianceError
from invariance.metrics.output_drift import describe_output_drift, output_drift, parse_tolerance


def test_figures_match_numpy():
    """Median, 95th percentile (numpy's default linear interpolation, Hyndman & Fan 1996,
    definition 7) and exceedance counts recomputed with numpy."""
    rng = np.random.default_rng(0)
    clean = rng.normal(size=(57, 3))
    cluttered = clean + rng.normal(scale=[0.01, 0.02, 0.05], size=(57, 3))
    tol = np.array([0.01, 0.02, 0.02])
    result = output_drift(clean, cluttered, tol)
    delta = np.abs(cluttered - clean)
    assert (result["pairs"], result["dimensions"]) == (57, 3)
    for j, row in enumerate(result["per_dimension"]):
        assert row["median"] == pytest.approx(np.median(delta[:, j]))
        assert row["p95"] == pytest.approx(np.percentile(delta[:, j], 95))
        assert row["pairs_exceeding"] == int((delta[:, j] > tol[j]).sum())
        assert row["share_exceeding"] == pytest.approx((delta[:, j] > tol[j]).mean())
        low, high = row["share_exceeding_ci"]
        assert low <= row["share_exceeding"] <= high
    assert result["any_exceeding"] == pytest.approx((delta > tol).any(axis=1).mean())
    assert result["caution"] == SAFETY_CAUTION


def test_clopper_pearson_closed_form():
    """With no pair above tolerance the exact upper bound is 1 - (alpha/2)^(1/n)
    (Clopper & Pearson, Biometrika 1934; the closed form at k = 0): 0.3085 at n = 10."""
    clean = np.zeros((10, 2))
    result = output_drift(clean, clean + 0.001, [0.01, 0.01])
    low, high = result["per_dimension"][0]["share_exceeding_ci"]
    assert low == 0.0
    assert high == pytest.approx(1 - 0.025 ** (1 / 10), abs=1e-9)
    assert high == pytest.approx(0.3085, abs=1e-4)


def test_no_tolerance_gives_figures_only():
    clean = np.arange(12.0).reshape(6, 2)
    result = output_drift(clean, clean + [[0.5, -1.0]], None, names=[f"p{i}" for i in range(6)])
    assert result["per_dimension"][1]["median"] == 1.0
    assert result["per_dimension"][0]["share_exceeding"] is None and result["any_exceeding"] is None
    assert result["largest_change_pair"] == "p0"


def test_text_lines_carry_the_caution():
    clean = np.zeros((5, 2))
    lines = describe_output_drift(output_drift(clean, clean + [0.0, 0.03], "0.01,0.02"))
    assert "above tolerance 0.02 in 5 of 5 pairs" in lines[2]
    assert lines[-1] == f"note: {SAFETY_CAUTION}"


def test_bad_tolerances_and_outputs_are_refused():
    clean = np.zeros((5, 3))
    with pytest.raises(InvarianceError, match="--output-tolerance has 2 value"):
        output_drift(clean, clean, [0.1, 0.1])
    for text in ("0.1,abc,0.2", "0.1,-0.1,0.2", "0.1,nan,0.2", ""):
        with pytest.raises(InvalidParameter) as err:
            parse_tolerance(text)
        assert err.value.parameter == "output_tolerance"
    np.testing.assert_array_equal(parse_tolerance(" 0.01, 0.01,0.02"), [0.01, 0.01, 0.02])
    with pytest.raises(InvarianceError, match="not one vector per image"):
        output_drift(np.zeros((5, 3, 2)), np.zeros((5, 3, 2)))
    with pytest.raises(InvarianceError, match="not one vector per image"):
        output_drift(np.zeros(5), np.zeros(5))
    with pytest.raises(InvarianceError, match="same order"):
        output_drift(clean, np.zeros((4, 3)))
    with pytest.raises(InvarianceError, match="NaN"):
        output_drift(clean, np.full((5, 3), np.nan))


# ------------------------------------------------------------------ a real policy

_POLICY = '''
import numpy as np
import torch
from pathlib import Path

from invariance.zoo import clean_only_encoder

HERE = Path(__file__).parent


def policy():
    """The clean-only demo CNN plus a linear head that reads the target's (x, y)."""
    encoder = clean_only_encoder()
    head = torch.nn.Linear(128, 2)
    with torch.no_grad():
        head.weight.copy_(torch.from_numpy(np.load(HERE / "head_w.npy")))
        head.bias.copy_(torch.from_numpy(np.load(HERE / "head_b.npy")))
    net = torch.nn.Sequential(encoder, head)
    net.invariance_preprocess = dict(encoder.invariance_preprocess)
    return net.eval()


def unflattened():
    net = policy()
    return torch.nn.Sequential(net, torch.nn.Unflatten(1, (2, 1)))
'''


@pytest.fixture(scope="module")
def policy_set(tmp_path_factory, one_torch_thread):
    """40 scenes, a ridge head fitted on the clean features' target positions, the policy file."""
    from sklearn.linear_model import Ridge

    from invariance.data import discover_pairs
    from invariance.encoders import extract_features, load_encoder
    from invariance.scenes import generate_scenes

    root = tmp_path_factory.mktemp("policy")
    pairs = discover_pairs(generate_scenes(root / "s", pairs=40, size=128, seed=11))
    encoder = load_encoder("python:invariance.zoo:clean_only_encoder", device="cpu")
    clean, _ = extract_features(pairs, encoder, progress=False)["output"]
    xy = np.stack([pairs.labels.tasks["x"], pairs.labels.tasks["y"]], axis=1)
    ridge = Ridge(alpha=1.0).fit(clean, xy)
    np.save(root / "head_w.npy", ridge.coef_.astype(np.float32))
    np.save(root / "head_b.npy", ridge.intercept_.astype(np.float32))
    (root / "policy.py").write_text(textwrap.dedent(_POLICY))
    return root, pairs, ridge, clean, xy


def test_policy_output_drift_in_its_units(policy_set, tmp_path):
    """A policy (demo CNN + linear head on clean positions): its outputs on both views are
    saved, reloaded, and the per-dimension figures recomputed with numpy."""
    from invariance.encoders import load_encoder
    from invariance.explain import policy_output_drift, policy_outputs

    root, pairs, ridge, clean_features, xy = policy_set
    policy = load_encoder(f"python:{root / 'policy.py'}:policy", device="cpu")
    clean_out, cluttered_out = policy_outputs(pairs, policy, batch_size=16)
    assert clean_out.shape == cluttered_out.shape == (40, 2)
    # the head is the ridge fit: on clean views the policy gives its predictions
    np.testing.assert_allclose(clean_out, ridge.predict(clean_features), atol=1e-4)
    assert np.mean(np.abs(clean_out - xy)) < 0.05  # it reads positions (0..1) on the clean views it was fitted on
    np.save(tmp_path / "clean.npy", clean_out)
    np.save(tmp_path / "cluttered.npy", cluttered_out)
    saved_clean, saved_cluttered = np.load(tmp_path / "clean.npy"), np.load(tmp_path / "cluttered.npy")
    tol = [0.02, 0.02]
    result = output_drift(saved_clean, saved_cluttered, tol, names=pairs.names)
    delta = np.abs(saved_cluttered - saved_clean)
    for j, row in enumerate(result["per_dimension"]):
        assert row["median"] == pytest.approx(np.median(delta[:, j]))
        assert row["p95"] == pytest.approx(np.percentile(delta[:, j], 95))
        assert row["share_exceeding"] == pytest.approx(np.mean(delta[:, j] > 0.02))
    assert result["per_dimension"][0]["p95"] > 0  # clutter does move the clean-only policy
    assert policy_output_drift(pairs, policy, tol)["per_dimension"] == result["per_dimension"]
    print("\npolicy output drift (x, y in image fractions):",
          [(round(r["median"], 4), round(r["p95"], 4), r["share_exceeding"]) for r in result["per_dimension"]])


def test_policy_with_a_non_vector_output_is_refused(policy_set):
    from invariance.encoders import load_encoder
    from invariance.explain import policy_outputs

    root, pairs, *_ = policy_set
    policy = load_encoder(f"python:{root / 'policy.py'}:unflattened", device="cpu")
    with pytest.raises(InvarianceError, match=r"returns \(16, 2, 1\).*not one 1-D output per image"):
        policy_outputs(pairs, policy, batch_size=8)


def test_wrong_tolerance_length_fails_before_the_whole_set_runs(policy_set):
    from invariance.encoders import load_encoder
    from invariance.explain import policy_output_drift

    root, pairs, *_ = policy_set
    policy = load_encoder(f"python:{root / 'policy.py'}:policy", device="cpu")
    calls = []
    policy.module.register_forward_hook(lambda module, args, out: calls.append(args[0].shape[0]))
    with pytest.raises(InvarianceError, match="--output-tolerance has 3 value.*outputs 2 number"):
        policy_output_drift(pairs, policy, "0.01,0.01,0.02")
    assert calls == [2]  # one pair, both views
