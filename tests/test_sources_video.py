"""Videos written with PyAV: one file per episode, every k-th frame, failures part-way."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner

from invariance.cli import cli
from invariance.errors import InvarianceError
from invariance.sources import SourceOptions, iter_frames, match_domains, open_source

from nulls import write_video
from test_sources_hdf5 import SMALL_ENCODER, bench_frames


def write_videos(folder, episodes=10, frames=12, clutter=False):
    folder.mkdir()
    for e in range(episodes):
        write_video(folder / f"episode_{e:02d}.avi", bench_frames(e, frames, clutter=clutter))
    return folder


def test_every_kth_frame_of_each_video(tmp_path):
    folder = write_videos(tmp_path / "a", episodes=2, frames=7)
    opts = SourceOptions(stride=3)
    source = open_source(str(folder), opts)  # the kind follows from the folder's files
    assert source.kind == "video" and [e.name for e in source.episodes] == ["episode_00", "episode_01"]
    frames = list(iter_frames(source, opts))
    assert [(f.episode, f.index) for f in frames] == [("episode_00", 0), ("episode_00", 3), ("episode_00", 6),
                                                     ("episode_01", 0), ("episode_01", 3), ("episode_01", 6)]
    # JPEG is lossy: the decoded frame is near the written one (mean error a few grey levels)
    written = bench_frames(1, 7)[3].astype(float)
    assert np.abs(frames[4].image.astype(float) - written).mean() < 8


def test_a_video_failing_part_way_keeps_the_frames_before_and_names_the_episode(tmp_path):
    folder = write_videos(tmp_path / "a", episodes=1, frames=30)
    path = folder / "episode_00.avi"
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])  # cut in the middle of a frame
    opts = SourceOptions()
    source = open_source(f"video:{folder}", opts)
    frames = list(iter_frames(source, opts))
    assert 5 <= len(frames) < 30
    assert [f.index for f in frames] == list(range(len(frames)))
    assert len(source.warnings) == 1 and source.warnings[0].startswith("episode episode_00:")
    assert f"the {len(frames)} frames kept before it are scored" in source.warnings[0]


def test_video_episode_shorter_than_the_stride_is_an_error(tmp_path):
    folder = write_videos(tmp_path / "a", episodes=1, frames=3)
    opts = SourceOptions(stride=4)
    with pytest.raises(InvarianceError, match="episode episode_00 has 3 frames, fewer than the stride 4"):
        list(iter_frames(open_source(f"video:{folder}", opts), opts))


def test_unreadable_video_is_a_clear_error(tmp_path):
    folder = tmp_path / "v"
    folder.mkdir()
    (folder / "episode_00.mp4").write_bytes(b"not a video at all")
    with pytest.raises(InvarianceError, match="episode_00.mp4: not a readable video"):
        open_source(f"video:{folder}")


def test_score_two_video_folders_end_to_end(tmp_path, one_torch_thread):
    a = write_videos(tmp_path / "bench", episodes=20, frames=8)
    b = write_videos(tmp_path / "site", episodes=20, frames=8, clutter=True)
    out = tmp_path / "r.json"
    run = CliRunner().invoke(cli, ["score", f"video:{a}", f"video:{b}", "--encoder", SMALL_ENCODER,
                                   "--image-size", "32", "--permutations", "199", "--stride", "2", "--quiet",
                                   "--json", str(out)], catch_exceptions=False)
    assert run.exit_code == 0, run.output
    result = json.loads(out.read_text())
    assert result["dataset"]["pairing"] == "paired" and result["dataset"]["frames"] == [80, 80]
    assert result["metrics"]["mmd"]["p_value"] < 0.01 and result["grouping"]["groups"] == 20
    domains = match_domains(open_source(f"video:{a}"), open_source(f"video:{b}"), SourceOptions(unpaired=True))
    assert domains.mode == "unpaired" and "share 20 episode names" in domains.notes[1]


def test_frames_at_a_set_rate_follow_the_timestamps(tmp_path):
    # written at 10 frames per second (write_video): 2.5 kept per second is every 4th frame
    # by timestamp (0, 0.4, 0.8, 1.2 s), whatever the codec's frame numbering
    folder = write_videos(tmp_path / "a", episodes=1, frames=14)
    source = open_source(f"video:{folder}#fps=2.5")
    assert [f.index for f in iter_frames(source, SourceOptions())] == [0, 4, 8, 12]
    with pytest.raises(InvarianceError, match="either fps= in the source spec or --stride"):
        list(iter_frames(source, SourceOptions(stride=2)))
    with pytest.raises(InvarianceError, match="fps='0' in a video source is not valid"):
        open_source(f"video:{folder}#fps=0")
