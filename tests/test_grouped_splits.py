"""Grouped splits: every fold, swap and resample keeps an episode whole, and it matters.

Frames of one episode share a component of their own in each domain (the lighting of that
recording, say): the null holds episode by episode (the two domains' recordings of an
episode are exchangeable as wholes) but not frame by frame. Tests that treat frames as
independent then reject far too often; grouped tests stay calibrated.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from nulls import rejection_band

from invariance.metrics.domain import domain_classifier, paired_folds
from invariance.metrics.mmd import paired_permutation_test
from invariance.metrics.probe import linear_probes
from invariance.scoring import score_features
from invariance.options import ScoringOptions

ALPHA = 0.05


def episode_null(episodes, frames, d, rng, *, episode_sd=1.0, frame_sd=0.3, shift=0.0):
    """Paired features, null by episode: scene + a per-(episode, domain) offset + frame noise.

    ``shift`` adds a clutter offset to the first quarter of the dimensions of domain B.
    """
    scene = rng.standard_normal((episodes, 1, d))
    own = [episode_sd * rng.standard_normal((episodes, 1, d)) for _ in range(2)]
    views = [scene + o + frame_sd * rng.standard_normal((episodes, frames, d)) for o in own]
    views[1][:, :, : d // 4] += shift
    groups = np.repeat(np.arange(episodes), frames)
    return views[0].reshape(-1, d), views[1].reshape(-1, d), groups


@settings(max_examples=40, deadline=None)
@given(st.lists(st.integers(1, 9), min_size=5, max_size=30), st.integers(2, 5), st.integers(0, 99))
def test_folds_never_split_a_group(sizes, folds, seed):
    groups = np.repeat(np.arange(len(sizes)), sizes)
    n = groups.size
    seen = np.zeros(n, dtype=int)
    for train, test in paired_folds(n, folds, seed=seed, groups=groups):
        held = test[: test.size // 2]
        assert np.array_equal(test[test.size // 2:], held + n)  # both views held out together
        assert not set(groups[held]) & set(groups[train[: train.size // 2]])
        seen[held] += 1
    assert np.all(seen == 1)  # each pair held out exactly once


def test_probe_split_keeps_episodes_on_one_side():
    rng = np.random.default_rng(0)
    clean, cluttered, groups = episode_null(12, 8, 6, rng)
    y = clean[:, 0] + 0.1 * rng.standard_normal(clean.shape[0])
    out = linear_probes(clean, cluttered, {"y": y}, groups=groups)["y"]
    # 12 episodes of 8 frames, GroupShuffleSplit(test_size=0.3) holds out ceil(0.3 * 12) = 4
    assert (out["n_train"], out["n_test"]) == (64, 32)
    assert "grouped by episode" in out["note"]


def _rejections(grouped, reps, seed):
    rng = np.random.default_rng(seed)
    hits = {"domain": 0, "mmd": 0}
    for _ in range(reps):
        clean, cluttered, groups = episode_null(20, 10, 8, rng)
        g = groups if grouped else None
        dc = domain_classifier(clean, cluttered, groups=g, permutations=99, seed=int(rng.integers(1e6)))
        mmd = paired_permutation_test(clean, cluttered, groups=g, permutations=99, seed=int(rng.integers(1e6)))
        hits["domain"] += dc["p_value"] <= ALPHA
        hits["mmd"] += mmd["p_value"] <= ALPHA
    return {k: v / reps for k, v in hits.items()}


@pytest.mark.slow
def test_grouped_tests_are_calibrated_and_frame_level_tests_are_not(one_torch_thread):
    # Acceptance of issue 12: >= 100 null repetitions with strongly correlated frames
    # within an episode; the rejection rate at alpha = 0.05 must lie inside the binomial 99%
    # band (exact binomial interval, scipy.stats.binom), and the same data with frame-level
    # splits and swaps must reject above it. Permutation p-values are exact (Ojala &
    # Garriga, JMLR 11, 2010; Phipson & Smyth 2010), so P(p <= 0.05) <= 0.05.
    reps = 120
    low, high = rejection_band(reps, ALPHA)
    grouped = _rejections(True, reps, seed=1)
    frame_level = _rejections(False, reps, seed=1)
    for name in ("domain", "mmd"):
        assert low <= grouped[name] <= high, (name, grouped[name], (low, high))
        assert frame_level[name] > high, (name, frame_level[name], high)


def test_a_shift_is_found_with_episodes_as_the_unit():
    rng = np.random.default_rng(3)
    clean, cluttered, groups = episode_null(20, 10, 8, rng, episode_sd=0.3, shift=1.5)
    out = score_features(clean, cluttered, groups=groups, options=ScoringOptions(permutations=199))
    assert out["metrics"]["domain_classifier"]["p_value"] < 0.01
    assert out["metrics"]["mmd"]["p_value"] < 0.01
    assert out["grouping"]["unit"] == "group" and out["grouping"]["groups"] == 20
    assert out["metrics"]["domain_classifier"]["grouping"] == {"unit": "group", "groups": 20}


def test_grouped_interval_is_wider_than_the_pair_interval_under_episode_correlation():
    # Cluster bootstrap (Davison & Hinkley 1997, section 3.8): with 20 episodes of 10
    # strongly correlated frames the effective sample is near 20, not 200, so resampling
    # whole episodes must give a wider interval of the mean drift than resampling frames.
    rng = np.random.default_rng(5)
    clean, cluttered, groups = episode_null(20, 10, 8, rng, episode_sd=0.8, frame_sd=0.05)
    opts = ScoringOptions(permutations=20)
    grouped = score_features(clean, cluttered, groups=groups, options=opts)["metrics"]["paired_drift"]
    frames = score_features(clean, cluttered, options=opts)["metrics"]["paired_drift"]
    width = lambda ci: ci[1] - ci[0]  # noqa: E731
    assert width(grouped["relative_drift_ci"]) > 1.5 * width(frames["relative_drift_ci"])
    assert "groups (episodes)" in grouped["ci_method"]


def test_too_few_groups_for_the_folds_is_a_clear_error():
    from invariance.errors import InvarianceError

    rng = np.random.default_rng(0)
    clean, cluttered, _ = episode_null(4, 10, 8, rng)
    with pytest.raises(InvarianceError, match="only 4 groups"):
        score_features(clean, cluttered, groups=np.repeat(np.arange(4), 10))


def test_a_paired_folder_with_an_episode_column_is_scored_by_episode(tmp_path, one_torch_thread):
    import json

    from click.testing import CliRunner
    from PIL import Image

    from invariance.cli import cli
    from invariance.sources.synthetic import workbench_episode

    rows = ["file,episode,part"]
    for e in range(10):
        clean, cluttered = (workbench_episode(e, 3, clutter=c)[0] for c in (False, True))
        for t in range(3):
            name = f"ep{e}_{t}.png"
            for view, frames in (("clean", clean), ("cluttered", cluttered)):
                (tmp_path / "d" / view).mkdir(parents=True, exist_ok=True)
                Image.fromarray(frames[t]).save(tmp_path / "d" / view / name)
            rows.append(f"{name},ep{e},{'nut' if e % 2 else 'bolt'}")
    (tmp_path / "d" / "labels.csv").write_text("\n".join(rows) + "\n")
    out = tmp_path / "r.json"
    run = CliRunner().invoke(cli, ["score", str(tmp_path / "d"), "--encoder", "python:invariance.zoo:clean_only_encoder",
                                   "--image-size", "32", "--permutations", "50", "--quiet", "--json", str(out)],
                             catch_exceptions=False)
    assert run.exit_code == 0, run.output
    result = json.loads(out.read_text())
    assert result["grouping"] == {**result["grouping"], "unit": "group", "groups": 10, "rows_per_group": [3, 3]}
    assert result["dataset"]["groups"] == 10
    probe = result["metrics"]["probe"]["part"]
    assert "grouped by episode" in probe["note"]


def test_group_codes_are_stable_so_names_and_codes_give_the_same_p_value():
    """check_groups applied to its own output changes nothing (common practice: an encoding
    is idempotent), so score_features, which encodes the groups before the domain classifier
    encodes them again, gives the p-value a caller gets with the names."""
    from invariance.metrics.domain import check_groups, domain_classifier

    codes = np.arange(12)
    np.testing.assert_array_equal(check_groups(codes, 12), codes)
    rng = np.random.default_rng(0)
    a = rng.standard_normal((60, 4))
    b = a + 0.3 * rng.standard_normal((60, 4))
    names = np.repeat([f"ep{i:02d}" for i in range(12)], 5)
    by_name = domain_classifier(a, b, permutations=99, groups=names)["p_value"]
    by_code = domain_classifier(a, b, permutations=99, groups=check_groups(names, 60))["p_value"]
    assert by_name == by_code
