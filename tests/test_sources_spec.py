"""The source spec syntax and hostile inputs to the readers."""

from __future__ import annotations

from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from invariance.errors import InvalidParameter, InvarianceError
from invariance.sources import SourceOptions, open_source, parse_spec


@pytest.mark.parametrize("spec, kind, path, settings_", [
    ("hdf5:demos.h5#frames=data/*/obs/front_image", "hdf5", "demos.h5", {"frames": "data/*/obs/front_image"}),
    ("replay.zarr#frames=data/img,ends=meta/ends", "zarr", "replay.zarr", {"frames": "data/img", "ends": "meta/ends"}),
    ("clip.mp4", "video", "clip.mp4", {}),
    ("images:site/frames", "images", "site/frames", {}),
    ("demos.hdf5#frames=data/*/img", "hdf5", "demos.hdf5", {"frames": "data/*/img"}),
])
def test_spec_kinds_paths_and_settings(spec, kind, path, settings_):
    parsed = parse_spec(spec)
    assert (parsed.kind, parsed.path, parsed.settings) == (kind, Path(path), settings_)


@pytest.mark.parametrize("spec, needle", [
    ("hdf5:demos.h5", "needs frames="),
    ("zarr:r.zarr#frames=a,colour=red", "unknown setting ['colour']"),
    ("video:clips#frames=x", "unknown setting ['frames']"),
    ("hdf5:d.h5#frames", "is not KEY=VALUE"),
    ("", "give a path"),
])
def test_bad_specs_name_the_problem(spec, needle):
    with pytest.raises(InvalidParameter, match=needle.replace("[", r"\[").replace("]", r"\]")):
        parse_spec(spec)


@settings(max_examples=200, deadline=None)
@given(st.text(max_size=60))
def test_any_text_is_a_spec_or_a_clear_error(text):
    try:
        parsed = parse_spec(text)
    except InvalidParameter as err:
        assert str(err) and "\n" not in str(err).strip()
    else:
        assert parsed.kind in ("hdf5", "zarr", "video", "images")


@settings(max_examples=25, deadline=None)
@given(st.binary(max_size=2048))
def test_random_bytes_as_an_hdf5_file_are_one_clear_error(tmp_path_factory, data):
    path = tmp_path_factory.mktemp("fuzz") / "x.h5"
    path.write_bytes(data)
    with pytest.raises(InvarianceError, match="x.h5"):
        open_source(f"hdf5:{path}#frames=data/*/img")


@settings(max_examples=25, deadline=None)
@given(st.binary(max_size=2048))
def test_random_bytes_as_a_video_are_one_clear_error(tmp_path_factory, data):
    folder = tmp_path_factory.mktemp("fuzz")
    (folder / "episode_0.avi").write_bytes(data)
    with pytest.raises(InvarianceError, match="episode_0.avi"):
        source = open_source(f"video:{folder}")
        from invariance.sources import iter_frames

        list(iter_frames(source, SourceOptions()))
