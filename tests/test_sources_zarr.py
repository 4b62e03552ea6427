"""Zarr stores built with zarr: a frames array with an episode-end index array beside it."""

from __future__ import annotations

import json

import numpy as np
import pytest
import zarr
from click.testing import CliRunner

from invariance.cli import cli
from invariance.errors import InvarianceError
from invariance.sources import SourceOptions, iter_frames, open_source

from test_sources_hdf5 import SMALL_ENCODER, bench_frames


def write_zarr(path, episodes=12, frames=10, *, clutter=False, ends=None):
    imgs = np.concatenate([bench_frames(e, frames, clutter=clutter) for e in range(episodes)])
    root = zarr.open_group(str(path), mode="w")
    root.create_array("data/img", data=imgs, chunks=(8, *imgs.shape[1:]))
    state = np.arange(imgs.shape[0], dtype=np.float64).reshape(-1, 1) * np.array([[1.0, -2.0]])
    root.create_array("data/state", data=state)
    ends = np.arange(1, episodes + 1) * frames if ends is None else np.asarray(ends)
    root.create_array("meta/episode_ends", data=ends.astype(np.int64))
    return path


def test_episodes_follow_the_end_index_array_and_labels_the_frames(tmp_path):
    path = write_zarr(tmp_path / "a.zarr", episodes=3, frames=5)
    opts = SourceOptions(stride=2, labels=("state=data/state",))
    source = open_source(f"zarr:{path}#frames=data/img", opts)
    assert [(e.name, e.n_frames) for e in source.episodes] == [("episode_0000", 5), ("episode_0001", 5),
                                                               ("episode_0002", 5)]
    frames = list(iter_frames(source, opts))
    assert [(f.episode, f.index) for f in frames[:4]] == [("episode_0000", 0), ("episode_0000", 2),
                                                         ("episode_0000", 4), ("episode_0001", 0)]
    # episode 1 frame 2 is row 5 + 2 = 7 of the store
    row = zarr.open_group(str(path), mode="r")["data/img"][7]
    assert np.array_equal(frames[4].image, row)
    assert frames[4].labels == {"state[0]": 7.0, "state[1]": -14.0}


def test_bad_episode_ends_and_missing_arrays_are_clear(tmp_path):
    path = write_zarr(tmp_path / "bad.zarr", episodes=3, frames=5, ends=[5, 4, 15])
    with pytest.raises(InvarianceError, match="episode ends must rise strictly"):
        open_source(f"zarr:{path}#frames=data/img")
    good = write_zarr(tmp_path / "good.zarr", episodes=2, frames=5)
    with pytest.raises(InvarianceError, match=r"no array 'data/rgb'; the store holds: .*img"):
        open_source(f"zarr:{good}#frames=data/rgb")
    with pytest.raises(InvarianceError, match="needs one row per frame"):
        open_source(f"zarr:{good}#frames=data/img", SourceOptions(labels=("x=meta/episode_ends",)))


def test_score_two_zarr_stores_end_to_end(tmp_path, one_torch_thread):
    a = write_zarr(tmp_path / "bench.zarr", episodes=20)
    b = write_zarr(tmp_path / "site.zarr", episodes=20, clutter=True)
    out = tmp_path / "r.json"
    run = CliRunner().invoke(cli, ["score", f"zarr:{a}#frames=data/img", f"zarr:{b}#frames=data/img",
                                   "--encoder", SMALL_ENCODER, "--image-size", "32", "--permutations", "199",
                                   "--label", "state=data/state", "--max-frames-per-episode", "6", "--quiet",
                                   "--json", str(out)], catch_exceptions=False)
    assert run.exit_code == 0, run.output
    result = json.loads(out.read_text())
    assert result["dataset"]["frames"] == [120, 120] and result["grouping"]["groups"] == 20
    assert result["metrics"]["mmd"]["p_value"] < 0.01
    assert "group" in result["metrics"]["domain_classifier"]["p_value_method"]
