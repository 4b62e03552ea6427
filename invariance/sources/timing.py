"""Cost of reading episodes: extraction from an episode file against the bare forward pass.

Used by tests/benchmarks/bench_sources.py (and meant for ``invariance bench``): the
target is extraction within 1.15x of the bare forward pass over the same frames.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

# Images per forward pass of the timing (the extraction default; docs/design.md).
BATCH = 32


def time_episode_extraction(encoder, *, episodes: int = 8, frames: int = 32, size: int = 64) -> dict:
    """Seconds of extraction from an HDF5 episode file and of the bare forward pass.

    Parameters
    ----------
    encoder : invariance.encoders.Encoder
        A loaded encoder (its preprocessing and device are used).
    episodes, frames, size : int
        The synthetic workbench file (:mod:`invariance.sources.synthetic`) timed.

    Returns
    -------
    dict
        ``frames``, ``read_s`` (reading alone), ``bare_s`` (the mean of a bare pass
        before and after, on the same frames preprocessed beforehand: the machine's load
        moves), ``extract_s`` and ``ratio`` (extract / bare).
    """
    import torch

    from invariance.bench import bare_forward_seconds
    from invariance.encoders.extraction import _frame_tensor, extract_frame_features
    from invariance.options import ExtractionOptions

    from . import SourceOptions, iter_frames, open_source
    from .synthetic import write_hdf5_episodes

    with tempfile.TemporaryDirectory() as tmp:
        path = write_hdf5_episodes(Path(tmp) / "episodes.h5", episodes, frames, size=size, labels=False)
        spec, opts = f"hdf5:{path}#frames=data/*/obs/front_image", SourceOptions()
        start = time.perf_counter()
        kept = list(iter_frames(open_source(spec, opts), opts))
        read_s = time.perf_counter() - start
        tensors = torch.stack([_frame_tensor(encoder.preprocess, f) for f in kept])
        bare = bare_forward_seconds(tensors, encoder, BATCH)
        start = time.perf_counter()
        extract_frame_features(iter_frames(open_source(spec, opts), opts), encoder,
                               options=ExtractionOptions(batch_size=BATCH), progress=False)
        extract_s = time.perf_counter() - start
        bare = (bare + bare_forward_seconds(tensors, encoder, BATCH)) / 2
    return {"frames": len(kept), "read_s": read_s, "bare_s": bare, "extract_s": extract_s,
            "ratio": extract_s / bare}
