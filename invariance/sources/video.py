"""Videos (PyAV): one file per episode, frames decoded one at a time and sampled.

A decoding error part-way keeps the frames decoded before it and records the failure
with the episode's name in the source's ``warnings``; a file that yields no frame at all
is an error.
"""

from __future__ import annotations

from pathlib import Path

import av

from invariance.errors import InvarianceError

from .base import MAX_FRAME_BYTES, Episode, Frame

EXTENSIONS = (".mp4", ".avi", ".mkv", ".mov", ".webm", ".m4v")


def _files(path: Path) -> list[Path]:
    if path.is_file():
        return [path]
    if path.is_dir():
        files = sorted(p for p in path.rglob("*") if p.is_file() and p.suffix.lower() in EXTENSIONS
                       and not p.name.startswith("."))
        if files:
            return files
        raise InvarianceError(f"{path}: no video files ({', '.join(EXTENSIONS)}) in this folder; give a video or a "
                              f"folder of them, one per episode")
    raise InvarianceError(f"{path}: no such file or folder; give a video or a folder of them, one per episode")


def _open(file: Path):
    try:
        container = av.open(str(file), mode="r")
    except (av.error.FFmpegError, OSError, ValueError) as err:
        raise InvarianceError(f"{file}: not a readable video ({str(err).splitlines()[0]}); check the file") from None
    if not container.streams.video:
        container.close()
        raise InvarianceError(f"{file}: holds no video stream")
    stream = container.streams.video[0]
    if stream.codec_context.width * stream.codec_context.height * 3 > MAX_FRAME_BYTES:
        container.close()
        raise InvarianceError(f"{file}: frames of {stream.codec_context.width} x {stream.codec_context.height} "
                              f"are larger than the {MAX_FRAME_BYTES:,} bytes a frame may take")
    return container, stream


# Sampling rates accepted (frames per second kept): above 1,000 no camera delivers frames.
MAX_FPS = 1000.0


def _check_fps(fps):
    if fps is None:
        return None
    try:
        value = float(fps)
    except (TypeError, ValueError):
        value = float("nan")
    if not 0.0 < value <= MAX_FPS:
        raise InvarianceError(f"fps={fps!r} in a video source is not valid; give frames per second kept, "
                              f"0 < fps <= {MAX_FPS:g}")
    return value


class VideoSource:
    """Episodes as video files (a file, or every video under a folder; the episode is the
    path relative to the folder without its extension).

    Frames are kept when their index is a multiple of the stride, or at a set rate
    (``fps``, frames kept per second of video, by timestamp), up to the cap; the frame
    count is what the container records, or unknown (``None``) until decoded. Frames keep
    their decoded index, so two domains' videos pair by (episode, frame index).
    """

    kind = "video"

    def __init__(self, path, labels=(), fps=None):
        self.fps = _check_fps(fps)
        if labels:
            raise InvarianceError("--label reads arrays from HDF5 or zarr files; videos carry no per-frame labels")
        self.path = Path(path)
        self.warnings: list[str] = []
        files = _files(self.path)
        self.episodes = []
        for file in files:
            container, stream = _open(file)
            n = int(stream.frames) or None
            container.close()
            name = file.relative_to(self.path).with_suffix("").as_posix() if self.path.is_dir() else file.stem
            self.episodes.append(Episode(name, n, str(file), file))

    def _keep(self, frame, index, stride, state):
        """Every ``stride``-th frame, or with ``fps`` the first frame at or after each tick
        of 1 / fps seconds on the stream's clock (frame timestamps, not frame counts)."""
        if self.fps is None:
            return index % stride == 0
        # a frame without a timestamp is placed by its index at the stream's average rate
        t = frame.time if frame.time is not None else index / state["rate"]
        if t + 1e-9 < state["next"]:
            return False
        state["next"] = t + 1.0 / self.fps
        return True

    def read(self, episode: Episode, options):
        """Decode the episode, yielding the kept frames; see the module docstring for failures."""
        if self.fps is not None and options.stride != 1:
            raise InvarianceError(f"video {episode.ref}: give either fps= in the source spec or --stride, not both")
        container, stream = _open(episode.ref)
        kept, index = 0, -1
        state = {"next": 0.0, "rate": float(stream.average_rate or 0) or 1.0}
        cap = options.max_frames_per_episode
        try:
            for frame in container.decode(stream):
                index += 1
                if not self._keep(frame, index, options.stride, state):
                    continue
                yield Frame(episode.name, index, frame.to_ndarray(format="rgb24"), {})
                kept += 1
                if cap is not None and kept >= cap:
                    break
        except (av.error.FFmpegError, ValueError, OSError) as err:
            if kept == 0:
                raise InvarianceError(f"video {episode.ref} (episode {episode.name}) failed to decode before any "
                                      f"kept frame ({str(err).splitlines()[0]}); re-encode or remove it") from None
            self.warnings.append(f"episode {episode.name}: video {episode.ref} stopped decoding after frame {index} "
                                 f"({str(err).splitlines()[0]}); the {kept} frames kept before it are scored")
        finally:
            container.close()
        if index + 1 < options.stride:
            raise InvarianceError(f"episode {episode.name} has {index + 1} frames, fewer than the stride "
                                  f"{options.stride}; lower --stride or leave the episode out")
