"""HDF5 episode files, built with h5py: reading, pairing, labels, bad input and scoring.

The frames are 32 px workbench scenes from invariance.scenes (clean, or cluttered at
level 3), filmed by invariance.sources.synthetic: frames of one episode share their
scene and differ by camera jitter and sensor noise, so they are strongly correlated.
"""

from __future__ import annotations

import json

import h5py
import numpy as np
import pytest
from click.testing import CliRunner

from invariance.cli import cli
from invariance.errors import InvarianceError
from invariance.sources import SourceOptions, iter_frames, match_domains, open_source
from invariance.sources.synthetic import workbench_episode, write_hdf5_episodes

SMALL_ENCODER = "python:invariance.zoo:clean_only_encoder"
PATTERN = "data/*/obs/front_image"
SIZE = 32


def bench_frames(episode, frames, *, clutter=False, size=SIZE, seed=0):
    """(frames, H, W, 3) uint8: one workbench scene filmed with jitter and noise."""
    return workbench_episode(episode, frames, clutter=clutter, size=size, seed=seed)[0]


def write_h5(path, episodes=20, frames=30, *, clutter=False, first=0, seed=0, labels=True, take=0):
    return write_hdf5_episodes(path, episodes, frames, clutter=clutter, first=first, seed=seed, labels=labels,
                               take=take)


def test_episodes_are_the_groups_and_frames_read_lazily_with_stride_and_cap(tmp_path):
    path = write_h5(tmp_path / "a.h5", episodes=3, frames=10)
    opts = SourceOptions(stride=3, max_frames_per_episode=3, labels=("ee=data/*/obs/ee_pos",))
    source = open_source(f"hdf5:{path}#frames={PATTERN}", opts)
    assert [e.name for e in source.episodes] == ["demo_0", "demo_1", "demo_2"]
    frames = list(iter_frames(source, opts))
    # stride 3 keeps 0, 3, 6, 9; a cap of 3 spreads them evenly: 0, 3 (index 1.5 rounds to 2 -> 6), 9
    assert [(f.episode, f.index) for f in frames[:3]] == [("demo_0", 0), ("demo_0", 6), ("demo_0", 9)]
    with h5py.File(path) as f:
        expected = f["data/demo_1/obs/front_image"][6]
        ee = f["data/demo_1/obs/ee_pos"][6]
    assert np.array_equal(frames[4].image, expected)
    assert frames[4].labels == {"ee[0]": ee[0], "ee[1]": ee[1], "ee[2]": ee[2]}


def test_pattern_matching_nothing_lists_what_the_file_holds(tmp_path):
    path = write_h5(tmp_path / "a.h5", episodes=2, frames=4)
    with pytest.raises(InvarianceError, match=r"matches no dataset; the file holds: data/demo_0/obs/ee_pos"):
        open_source(f"hdf5:{path}#frames=data/*/obs/wrist_image")


def test_float_frames_and_frames_of_different_shapes_are_refused(tmp_path):
    with h5py.File(tmp_path / "f.h5", "w") as f:
        f["data/demo_0/obs/front_image"] = np.zeros((4, 8, 8, 3), dtype=np.float32)
    with pytest.raises(InvarianceError, match="float32 values; image frames must be uint8"):
        open_source(f"hdf5:{tmp_path / 'f.h5'}#frames={PATTERN}")
    with h5py.File(tmp_path / "s.h5", "w") as f:
        f["data/demo_0/obs/front_image"] = np.zeros((4, 8, 8, 3), dtype=np.uint8)
        f["data/demo_1/obs/front_image"] = np.zeros((4, 16, 8, 3), dtype=np.uint8)
    with pytest.raises(InvarianceError, match="frames of different shapes"):
        open_source(f"hdf5:{tmp_path / 's.h5'}#frames={PATTERN}")


def test_links_to_other_files_are_not_followed(tmp_path):
    write_h5(tmp_path / "other.h5", episodes=1, frames=4)
    with h5py.File(tmp_path / "link.h5", "w") as f:
        f["data/demo_9/obs/front_image"] = h5py.ExternalLink(str(tmp_path / "other.h5"), "data/demo_0/obs/front_image")
        f["data/demo_1/obs/front_image"] = np.zeros((4, 8, 8, 3), dtype=np.uint8)
    source = open_source(f"hdf5:{tmp_path / 'link.h5'}#frames={PATTERN}")
    assert [e.name for e in source.episodes] == ["demo_1"]


def test_episode_shorter_than_the_stride_names_it(tmp_path):
    path = write_h5(tmp_path / "a.h5", episodes=2, frames=4)
    opts = SourceOptions(stride=5)
    source = open_source(f"hdf5:{path}#frames={PATTERN}", opts)
    with pytest.raises(InvarianceError, match="episode demo_0 has 4 frames, fewer than the stride 5"):
        list(iter_frames(source, opts))


def test_missing_episode_is_an_error_or_skipped(tmp_path):
    a = write_h5(tmp_path / "a.h5", episodes=4, frames=3, labels=False)
    b = write_h5(tmp_path / "b.h5", episodes=3, frames=3, labels=False)
    spec = lambda p: f"hdf5:{p}#frames={PATTERN}"  # noqa: E731
    with pytest.raises(InvarianceError, match="1 episodes are in one domain only: A:demo_3"):
        match_domains(open_source(spec(a)), open_source(spec(b)), SourceOptions())
    domains = match_domains(open_source(spec(a)), open_source(spec(b)), SourceOptions(skip_unpaired=True))
    assert domains.mode == "paired" and domains.skipped == ["A:demo_3"] and len(domains.a.episodes) == 3
    c = write_h5(tmp_path / "c.h5", episodes=3, frames=3, first=10, labels=False)
    assert match_domains(open_source(spec(a)), open_source(spec(c)), SourceOptions()).mode == "unpaired"


def _score(args):
    return CliRunner().invoke(cli, ["score", *args, "--encoder", SMALL_ENCODER, "--image-size", "32", "--quiet"],
                              catch_exceptions=False)


def test_score_finds_a_known_clutter_shift_in_two_hdf5_files(tmp_path, one_torch_thread):
    # Acceptance of issue 12: two files of 20 episodes x 30 frames, the second with clutter.
    # 999 permutations: with 199 the smallest p is 0.005, and one permuted accuracy reaching
    # the observed 0.907 (seen once, after a change of fold assignment) gives exactly 0.01;
    # with 999 the same data give 0.001.
    a = write_h5(tmp_path / "bench.h5", clutter=False)
    b = write_h5(tmp_path / "site.h5", clutter=True)
    out = tmp_path / "r.json"
    run = _score([f"hdf5:{a}#frames={PATTERN}", f"hdf5:{b}#frames={PATTERN}", "--stride", "2",
                  "--permutations", "999", "--label", "ee=data/*/obs/ee_pos", "--json", str(out)])
    assert run.exit_code == 0, run.output
    result = json.loads(out.read_text())
    metrics = result["metrics"]
    assert metrics["domain_classifier"]["p_value"] < 0.01 and metrics["mmd"]["p_value"] < 0.01
    assert result["dataset"]["pairing"] == "paired" and result["dataset"]["frames"] == [300, 300]
    assert result["grouping"]["groups"] == 20 and result["grouping"]["rows_per_group"] == [15, 15]
    assert set(metrics["probe"]) == {"ee[0]", "ee[1]", "ee[2]"}
    assert result["pairs"][0]["name"] == "demo_0#0"


def test_bad_source_is_exit_1_with_one_line_and_no_output(tmp_path):
    a = write_h5(tmp_path / "a.h5", episodes=2, frames=4)
    out = tmp_path / "r.json"
    run = CliRunner().invoke(cli, ["score", f"hdf5:{a}#frames=nope/*", f"hdf5:{a}#frames={PATTERN}", "--encoder",
                                   SMALL_ENCODER, "--json", str(out)])
    assert run.exit_code == 1
    assert "matches no dataset" in run.output and not out.exists()
    run = CliRunner().invoke(cli, ["score", f"hdf5:{a}#frame={PATTERN}", f"hdf5:{a}", "--encoder", SMALL_ENCODER])
    assert run.exit_code in (1, 2) and "unknown setting" in run.output


def test_a_file_claiming_billions_of_frames_is_refused_before_reading(tmp_path):
    # HDF5 returns the fill value for chunks never written: a small file can claim 10^7
    # frames; the work is bounded before any frame is read (the file holds no data at all).
    with h5py.File(tmp_path / "huge.h5", "w") as f:
        f.create_dataset("data/demo_0/obs/front_image", shape=(10**7, 32, 32, 3), dtype=np.uint8,
                         chunks=(64, 32, 32, 3))
    assert (tmp_path / "huge.h5").stat().st_size < 100_000
    source = open_source(f"hdf5:{tmp_path / 'huge.h5'}#frames={PATTERN}")
    with pytest.raises(InvarianceError, match="10,000,000 frames would be scored"):
        next(iter_frames(source, SourceOptions()))
    capped = SourceOptions(max_frames_per_episode=3)
    assert [f.index for f in iter_frames(source, capped)] == [0, 5_000_000, 9_999_999]


def test_a_folder_of_files_names_episodes_by_file_and_group(tmp_path):
    folder = tmp_path / "runs"
    folder.mkdir()
    write_h5(folder / "monday.h5", episodes=2, frames=3, labels=False)
    write_h5(folder / "tuesday.h5", episodes=1, frames=3, first=5, labels=False)
    (folder / "notes.txt").write_text("not an episode file")
    source = open_source(str(folder) + f"#frames={PATTERN}")  # the kind follows from the files
    assert [e.name for e in source.episodes] == ["monday/demo_0", "monday/demo_1", "tuesday/demo_5"]


@pytest.mark.slow
def test_two_recordings_of_the_same_clean_scenes_are_rarely_told_apart(tmp_path, one_torch_thread):
    # The file-level null: both domains film the same 20 clean scenes, each with its own
    # jitter and noise (another take), so whole episodes are exchangeable. 10 repetitions
    # through the whole path (files, reader, encoder, tests); the calibration itself is
    # measured on features in test_grouped_splits.py (120 repetitions). With P(reject) <=
    # 0.05 each, 4 or more rejections of 10 by one test has binomial probability 0.001
    # (scipy.stats.binom.sf(3, 10, 0.05)).
    rejections = {"domain_classifier": 0, "mmd": 0}
    for rep in range(10):
        a = write_h5(tmp_path / f"a{rep}.h5", seed=rep, take=1, labels=False)
        b = write_h5(tmp_path / f"b{rep}.h5", seed=rep, take=2, labels=False)
        out = tmp_path / f"r{rep}.json"
        run = _score([f"hdf5:{a}#frames={PATTERN}", f"hdf5:{b}#frames={PATTERN}", "--stride", "3",
                      "--permutations", "99", "--seed", str(rep), "--json", str(out)])
        assert run.exit_code == 0, run.output
        metrics = json.loads(out.read_text())["metrics"]
        for name in rejections:
            rejections[name] += metrics[name]["p_value"] <= 0.05
    assert max(rejections.values()) <= 3, rejections
